"""Nyström's direct solve against preconditioned CG on rows in memory: time and iterations.

The scale bench's response (:func:`bench.scale_bench.response`, the same generator and seed
as its CSV) on ``--rows`` rows, standardized; the first 80 % train, 10,000 of the rest
validate. For the given kernel and ridge (defaults: what tuning chose on this response)
it times the direct solve (m × m sums and two eigendecompositions) and CG to ``--tol``,
prints how many iterations each relative residual needed, the cost per row and m² element
(direct) and per kernel value (CG), and the validation RMSE of both. The load average is
printed beside every figure.

    .venv/bin/python bench/cg_bench.py --rows 200000 --landmarks 1500
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from bench.machine import header  # noqa: E402
from bench.scale_bench import NOISE, response  # noqa: E402


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=200_000)
    ap.add_argument("--landmarks", type=int, default=1500)
    ap.add_argument("--gamma", type=float, default=0.042)
    ap.add_argument("--ridge", type=float, default=6.4e-5)
    ap.add_argument("--tol", type=float, default=1e-7)
    ap.add_argument("--max-iter", type=int, default=300)
    args = ap.parse_args()
    from service.kernels import KernelSpec, kernel_block
    from trainer.nystrom import cg, numerics
    from trainer.nystrom.cg_rows import LocalRows

    print(header("CG bench: Nyström direct solve vs preconditioned CG, rows in memory"))
    rng = np.random.default_rng(1)
    x = rng.uniform(-1.0, 1.0, (args.rows, 8))
    y = (response(x) + NOISE * rng.standard_normal(args.rows))[:, None]
    xs = (x - x.mean(0)) / x.std(0)
    cut = int(0.8 * args.rows)
    tr, ytr, xv, yv = xs[:cut], y[:cut], xs[cut:cut + 10_000], y[cut:cut + 10_000]
    lm = xs[numerics.pick_landmarks(xs[:50_000], args.landmarks, "uniform",
                                    np.random.default_rng(0))]
    spec, m = KernelSpec("rbf", gamma=args.gamma), lm.shape[0]
    kv = kernel_block(spec, xv, lm)

    def rmse(beta, mean):
        return float(np.sqrt(np.mean((kv @ beta + mean - yv) ** 2)))

    load = os.getloadavg()[0]
    t0 = time.perf_counter()
    path = numerics.ridge_path(spec, lm, numerics.accumulate(spec, lm, tr, ytr))
    direct = time.perf_counter() - t0
    print(f"direct: {direct:.1f} s, {direct / (cut * m * m) * 1e9:.3f} ns per row and m² "
          f"element, rank {path.rank}, validation RMSE "
          f"{rmse(path.dual(args.ridge), path.intercept):.5f} "
          f"(load {load:.1f} → {os.getloadavg()[0]:.1f})", flush=True)
    rows = LocalRows(spec, lm, tr, ytr)
    load = os.getloadavg()[0]
    fit = cg.solve_nystrom_cg(spec, lm, rows, rows.mean, rows.count, [args.ridge], args.tol,
                              args.max_iter)
    run = fit.run
    per_value = run.seconds / max(run.iterations, 1) / (cut * m)
    print(f"cg: {run.iterations} iterations in {run.seconds:.1f} s "
          f"({per_value * 1e9:.2f} ns per kernel value), converged {run.converged}, "
          f"validation RMSE {rmse(fit.betas[0], fit.intercept):.5f} "
          f"(load {load:.1f} → {os.getloadavg()[0]:.1f})")
    for tol in (1e-2, 1e-3, 1e-4, 1e-5, 1e-6, 1e-7):
        k = next((i for i, v in enumerate(run.history) if v <= tol), None)
        print(f"  relative residual ≤ {tol:g}: {k if k is not None else '>'} iterations")
    print(f"equal cost at m ≈ iterations × {per_value / (direct / (cut * m * m)):.0f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
