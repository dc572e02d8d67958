"""Tuning speed: exact-LOO grid search against scikit-learn's GridSearchCV, side by side.

Friedman #1 (Friedman 1991, "Multivariate Adaptive Regression Splines"; generated with
scikit-learn's ``make_friedman1``), 3,000 training rows, 2,000 fresh rows to score. Both search
the same grid — the 8 kernel widths kridge derives from the data × 30 ridge values — and both
refit the chosen setting on all training rows:

* kridge: one eigendecomposition per width gives the exact LOO error for all 30 ridges;
* reference: ``GridSearchCV(KernelRidge(kernel="rbf"), cv=5)``, 8 × 30 × 5 = 1,200 fits, run with
  ``n_jobs=2`` (its processes get one BLAS thread each), its best configuration here.

Target: ≥ 10× faster with held-out RMSE no more than 2 % worse. The machine is shared:
timings are noisy, so read the ratio, not the seconds.

    .venv/bin/python bench/tuning_bench.py [--rows 3000] [--eigh-sizes 2000,4000,6000]

``--eigh-sizes`` also times one kernel-matrix eigendecomposition per size, the figure behind
the exact leave-one-out limit (``trainer.validation.folds.EXACT_MAX_ROWS``; DEVELOPERS.md, "Measured
limits"): a single-kernel search needs about 13 of them.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
from sklearn.datasets import make_friedman1
from sklearn.kernel_ridge import KernelRidge
from sklearn.model_selection import GridSearchCV

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from bench.machine import add_json_option, header, save  # noqa: E402
from service.kernels import KernelSpec, kernel_matrix  # noqa: E402
from trainer.exact.fit import Standardizer, fit_exact  # noqa: E402
from trainer.exact.loo import eigen_kernel  # noqa: E402
from trainer.tuning.search import WIDTH_GRID_SIZE  # noqa: E402
from trainer.tuning.widths import width_range  # noqa: E402
from trainer.tuning.workers import Runner  # noqa: E402
from trainer.validation.folds import RIDGE_GRID_SIZE, RIDGE_RELATIVE, Problem  # noqa: E402


def eigh_seconds(sizes: list[int]) -> None:
    """Print the time of one rbf kernel-matrix eigendecomposition per size."""
    rng = np.random.default_rng(0)
    for n in sizes:
        x = rng.standard_normal((n, 8))
        k = kernel_matrix(KernelSpec("rbf", gamma=0.125), x)
        t0 = time.perf_counter()
        eigen_kernel(k)
        seconds = time.perf_counter() - t0
        print(f"eigh n = {n}: {seconds:.2f} s; a single-kernel search (~13 of them) "
              f"≈ {13 * seconds:.0f} s")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--rows", type=int, default=3000)
    ap.add_argument("--fresh", type=int, default=2000)
    ap.add_argument("--eigh-sizes", default="",
                    help="comma-separated sizes to time one eigendecomposition at")
    add_json_option(ap)
    args = ap.parse_args()
    print(header("tuning bench: exact-LOO grid search vs GridSearchCV(KernelRidge)"))
    if args.eigh_sizes:
        eigh_seconds([int(v) for v in args.eigh_sizes.split(",")])
    x, y = make_friedman1(n_samples=args.rows, noise=1.0, random_state=0)
    x_new, y_new = make_friedman1(n_samples=args.fresh, noise=1.0, random_state=1)
    y2 = y[:, None]

    # ---- kridge: exact LOO over the grid
    t0 = time.perf_counter()
    scaler = Standardizer.fit(x)
    x_s = scaler(x)
    lo, hi = width_range("rbf", x_s)
    gammas = np.geomspace(lo, hi, WIDTH_GRID_SIZE)
    ridges = np.geomspace(*RIDGE_RELATIVE, RIDGE_GRID_SIZE)  # mean diag K = 1
    problem = Problem(x_s, y2 - y2.mean(axis=0), 1.0 / y2.var(axis=0), None)
    runner = Runner(len(x), True, len(gammas))
    curves = runner(problem, [KernelSpec("rbf", gamma=float(g)) for g in gammas])
    runner.close()
    best = min(curves, key=lambda c: c.best_score)
    ours_ridge = float(best.ridges[best.best])
    ours_fit = fit_exact(x, y2, best.spec, ours_ridge)
    t_ours = time.perf_counter() - t0
    rmse_ours = float(np.sqrt(np.mean((ours_fit.predict(x_new)[:, 0] - y_new) ** 2)))

    # ---- reference: GridSearchCV(KernelRidge, cv=5) on the same standardized, centered data
    t0 = time.perf_counter()
    mean = y.mean()
    ref = GridSearchCV(KernelRidge(kernel="rbf"), {"gamma": gammas, "alpha": ridges}, cv=5,
                       scoring="neg_mean_squared_error", n_jobs=2).fit(x_s, y - mean)
    t_ref = time.perf_counter() - t0
    rmse_ref = float(np.sqrt(np.mean((ref.predict(scaler(x_new)) + mean - y_new) ** 2)))

    print(f"Friedman #1: {args.rows} training rows, {args.fresh} fresh rows; grid "
          f"{len(gammas)} widths ({lo:.3g} … {hi:.3g}) × {len(ridges)} ridges")
    print(f"{'':34}{'seconds':>9}{'fresh RMSE':>12}  chosen")
    print(f"{'kridge exact LOO (8 eigh)':34}{t_ours:9.2f}{rmse_ours:12.4f}  "
          f"gamma={best.spec.gamma:.4g} ridge={ours_ridge:.3g}")
    print(f"{'GridSearchCV(KernelRidge, cv=5)':34}{t_ref:9.2f}{rmse_ref:12.4f}  "
          f"gamma={ref.best_params_['gamma']:.4g} ridge={ref.best_params_['alpha']:.3g}")
    print(f"speed-up {t_ref / t_ours:.1f}x (target >= 10x); RMSE ratio ours/reference "
          f"{rmse_ours / rmse_ref:.4f} (target <= 1.02); {runner.how}")
    save(args.json, "tuning", {"rows": args.rows, "ours_s": t_ours, "reference_s": t_ref,
                               "ratio_reference_to_ours": t_ref / t_ours,
                               "ratio_rmse_ours_to_reference": rmse_ours / rmse_ref})


if __name__ == "__main__":
    main()
