"""Nyström landmarks: uniform sampling against k-means++ (D² sampling) at equal m.

Both schemes pick m landmarks from the same standardized rows of a synthetic process of our
own (the one of bench/scale_bench.py), fit the same ridge, and are scored on fresh rows; each
(m, scheme) pair is repeated with several seeds. Printed: mean fresh-data RMSE, its spread,
the time to pick the landmarks, and the ratio k-means++ / uniform.

    .venv/bin/python bench/landmark_bench.py [--rows 100000] [--seeds 3]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

from scale_bench import NOISE, response  # noqa: E402

from bench.machine import header  # noqa: E402
from service.kernels import KernelSpec, kernel_matrix  # noqa: E402
from trainer.nystrom.numerics import fit_in_memory, pick_landmarks  # noqa: E402


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=100_000)
    ap.add_argument("--seeds", type=int, default=3)
    ap.add_argument("--m", type=int, nargs="*", default=[250, 500, 1000, 2000])
    args = ap.parse_args()
    print(header('landmark bench: uniform vs k-means++ Nyström landmarks'))
    rng = np.random.default_rng(0)
    x = rng.uniform(-1, 1, (args.rows, 8))
    y = (response(x) + NOISE * rng.standard_normal(args.rows))[:, None]
    xt = rng.uniform(-1, 1, (20_000, 8))
    yt = response(xt)[:, None]
    mean, sd = x.mean(0), x.std(0)
    xs, qt = (x - mean) / sd, (xt - mean) / sd
    # near what tuning picks for this response at these sizes (gamma 0.03–0.05)
    spec, ridge = KernelSpec("rbf", gamma=0.04), 1e-3
    print(f"# landmark bench: {args.rows} rows × 8 of bench/scale_bench.py's response, noise "
          f"SD {NOISE}, rbf(gamma=0.04), ridge 1e-3, {args.seeds} seeds")
    print(f"{'m':>6}{'scheme':>10}{'RMSE vs f':>12}{'± sd':>9}{'pick s':>9}")
    for m in args.m:
        mean_rmse = {}
        for scheme in ("uniform", "kmeans++"):
            errs, picks = [], []
            for seed in range(args.seeds):
                t0 = time.perf_counter()
                lm = xs[pick_landmarks(xs, m, scheme, np.random.default_rng(seed))]
                picks.append(time.perf_counter() - t0)
                beta, ybar = fit_in_memory(spec, lm, xs, y, ridge)
                pred = kernel_matrix(spec, qt, lm) @ beta + ybar
                errs.append(float(np.sqrt(np.mean((pred - yt) ** 2))))
            mean_rmse[scheme] = float(np.mean(errs))
            print(f"{m:>6}{scheme:>10}{np.mean(errs):>12.4f}{np.std(errs):>9.4f}"
                  f"{np.mean(picks):>9.2f}")
        print(f"{'':>6}{'ratio':>10}{mean_rmse['kmeans++'] / mean_rmse['uniform']:>12.3f}"
              "  (k-means++ / uniform; below 1: k-means++ better)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
