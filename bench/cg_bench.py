"""Nyström's CG iteration: float32 kernel values against float64 ones, and the direct solve.

The scale bench's response (:func:`bench.scale_bench.response`, the same generator and seed
as its CSV) on ``--rows`` rows, standardized; the first 80 % train, 4,000 of the rest drive
the validation stopping rule and 10,000 more are fresh test rows. For the given kernel and
ridges (defaults: what tuning chose on this response, the three candidates the job solves
side by side) it runs, one after another in this process:

* CG with float64 tiles (kridge's default) and with float32 kernel values and float64
  products (the ``TILE_DTYPE`` option), both stopped by the validation rule; printed: seconds
  per iteration, ns per kernel value, the ratio, where each column stopped, the test RMSE
  of every ridge and the largest β and prediction differences between the two;
* with ``--float32-sums``, the same iteration with float32 products as well (not used by
  kridge: it diverges at tiny ridges, which this shows);
* with ``--direct``, the direct solve (m × m sums and two eigendecompositions), its cost per
  row and m² element and its test RMSE.

The load average is printed beside every figure: the machine is shared.

    .venv/bin/python bench/cg_bench.py --rows 200000 --landmarks 4000 --direct
    .venv/bin/python bench/cg_bench.py --rows 1000000 --landmarks 10000 --max-iter 3
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


def float32_sums(kern, x, _y, v):
    """K_xmᵀ(K_xm v) with float32 values and float32 products (for comparison only)."""
    from trainer.nystrom import cg

    out = np.zeros((kern.n, v.shape[1]))
    v32 = v.astype(np.float32)
    for _i, k in cg._tiles(kern, x):
        out += k.T @ (k @ v32)
    return out


def run_cg(args, spec, lm, tr, ytr, check, dtype, gram=None):
    """One CG solve; (fit, seconds per iteration, load before → after)."""
    from trainer.nystrom import cg
    from trainer.nystrom.cg_rows import LocalRows

    rows = LocalRows(spec, lm, tr, ytr, dtype=dtype)
    if gram is not None:
        real = cg.gram_block
        cg.gram_block = gram
    load = os.getloadavg()[0]
    t0 = time.perf_counter()
    try:
        fit = cg.solve_nystrom_cg(spec, lm, rows, rows.mean, rows.count, args.ridges, 1e-8,
                                  args.max_iter, check=check)
    finally:
        if gram is not None:
            cg.gram_block = real
    per_it = fit.run.seconds / max(fit.run.iterations, 1)
    setup = time.perf_counter() - t0 - fit.run.seconds
    return fit, per_it, f"{setup:.0f} s before the iterations; load {load:.1f} → " \
                        f"{os.getloadavg()[0]:.1f}"


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=200_000)
    ap.add_argument("--landmarks", type=int, default=4000)
    ap.add_argument("--gamma", type=float, default=0.042)
    ap.add_argument("--ridges", type=float, nargs="+", default=[6.4e-5, 3.7e-4, 2.1e-3])
    ap.add_argument("--max-iter", type=int, default=100)
    ap.add_argument("--direct", action="store_true", help="the direct solve as well")
    ap.add_argument("--float32-only", action="store_true",
                    help="only the float32-values iteration (a per-iteration cost at scale)")
    ap.add_argument("--test-rows", type=int, default=10_000)
    ap.add_argument("--float32-sums", action="store_true",
                    help="also the iteration with float32 products")
    args = ap.parse_args()
    from service.kernels import KernelSpec, kernel_block
    from trainer.nystrom import numerics

    print(header("CG bench: float32 kernel values vs float64 in Nyström's CG iteration"))
    rng = np.random.default_rng(1)
    x = rng.uniform(-1.0, 1.0, (args.rows, 8))
    y = (response(x) + NOISE * rng.standard_normal(args.rows))[:, None]
    xs = (x - x.mean(0)) / x.std(0)
    cut = int(0.8 * args.rows)
    tr, ytr = xs[:cut], y[:cut]
    check = (xs[cut:cut + 4000], y[cut:cut + 4000])
    xt, yt = xs[cut + 4000:cut + 4000 + args.test_rows], y[cut + 4000:cut + 4000 + args.test_rows]
    lm = xs[numerics.pick_landmarks(xs[:50_000], args.landmarks, "uniform",
                                    np.random.default_rng(0))]
    spec, m = KernelSpec("rbf", gamma=args.gamma), lm.shape[0]
    kt = kernel_block(spec, xt, lm)
    print(f"# {cut} training rows, {m} landmarks, rbf gamma {args.gamma}, ridges "
          f"{args.ridges}; {xt.shape[0]} test rows; noise SD {NOISE}")

    def rmse(beta, mean):
        return float(np.sqrt(np.mean((kt @ beta + mean - yt) ** 2)))

    runs = [("float32 values", np.float32, None)]
    if not args.float32_only:
        runs.insert(0, ("float64 tiles", np.float64, None))
    if args.float32_sums:
        runs.append(("float32 values and sums", np.float32, float32_sums))
    fits = {}
    for label, dtype, gram in runs:
        fit, per_it, load = run_cg(args, spec, lm, tr, ytr, check, dtype, gram)
        fits[label] = (fit, per_it)
        run = fit.run
        tests = ", ".join(f"{rmse(b, fit.intercept):.5f}" for b in fit.betas)
        print(f"{label}: {run.iterations} iterations, {per_it:.2f} s each "
              f"({per_it / (cut * m) * 1e9:.3f} ns per kernel value; {load}); stopped by "
              f"{run.stopped_by} at {run.column_iterations}; test RMSE per ridge {tests}",
              flush=True)
    f32, per32 = fits["float32 values"]
    ref = fits.get("float64 tiles", fits["float32 values"])
    print(f"float32 values / float64 tiles, time per iteration: {per32 / ref[1]:.3f}")
    for i, (a, b) in enumerate(zip(ref[0].betas, f32.betas, strict=True)):
        same = ref[0].run.column_iterations[i] == f32.run.column_iterations[i]
        rel = np.abs(a - b).max() / np.abs(a).max()
        print(f"ridge {args.ridges[i]:g}: max |Δβ| / max |β| {rel:.2e}, "
              f"max |Δ prediction| {np.abs(kt @ (a - b)).max():.2e}"
              + ("" if same else " (stopped at different iterations)"))
    if args.direct:
        load = os.getloadavg()[0]
        t0 = time.perf_counter()
        path = numerics.ridge_path(spec, lm, numerics.accumulate(spec, lm, tr, ytr))
        direct = time.perf_counter() - t0
        tests = ", ".join(f"{rmse(path.dual(r), path.intercept):.5f}" for r in args.ridges)
        print(f"direct: {direct:.1f} s, {direct / (cut * m * m) * 1e9:.3f} ns per row and m² "
              f"element, rank {path.rank}, test RMSE per ridge {tests} "
              f"(load {load:.1f} → {os.getloadavg()[0]:.1f}); equal cost at m ≈ iterations × "
              f"{per32 / (cut * m) / (direct / (cut * m * m)):.0f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
