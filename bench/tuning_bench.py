"""Tuning speed: the search's cost in eigendecompositions, its answer, and scikit-learn.

Three parts (``--parts``, all by default):

* ``ratios`` — ``tune()`` on the plant-like data set (``bench/tuning_data.py``: 4 inputs) at
  4,000 training rows with ``kernel="rbf"`` and ``"auto"``, and at 3,900 and 4,100 rows (the
  exact leave-one-out limit lies between), each timed against one ``numpy.linalg.eigh`` of
  a kernel matrix of the same size in the same run. Targets: one kernel ≤ 4 eighs, auto ≤
  2.5 × one kernel, 4,100 rows no step from 3,900. The machine is shared, so read ratios;
* ``table`` — held-out RMSE of the choice against the full search (no subsample, no race:
  every setting searched whole on all rows, as before the race), on the plant-like,
  competing-kernels and fine-sine sets, Friedman #1 (Friedman 1991; scikit-learn's
  ``make_friedman1``) and scikit-learn's diabetes data. Target: within 2 %;
* ``sklearn`` — the LOO grid against ``GridSearchCV(KernelRidge, cv=5)`` on Friedman #1,
  3,000 training rows: both search the same grid (the 8 widths kridge derives from the
  data × 30 ridge values) and refit the choice on all training rows; the reference runs 1,200
  fits with ``n_jobs=2``. Target: ≥ 10× faster, held-out RMSE no more than 2 % worse.

    .venv/bin/python bench/tuning_bench.py [--parts ratios,table,sklearn] [--rows 4000]
        [--table-rows 1500] [--eigh-sizes 2000,4000,6000]

``--eigh-sizes`` also times one kernel-matrix eigendecomposition per size.
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
from bench.tuning_data import competing, fine_sine, plant  # noqa: E402
from service.kernels import KernelSpec, kernel_matrix  # noqa: E402
from trainer.exact.fit import Standardizer, fit_exact  # noqa: E402
from trainer.exact.loo import eigen_kernel  # noqa: E402
from trainer.tuning import search  # noqa: E402
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
        print(f"eigh n = {n}: {seconds:.2f} s")


def _eigh_seconds(n: int) -> float:
    """One numpy.linalg.eigh of an n × n rbf kernel matrix (4 inputs), in seconds."""
    x, _ = plant(n, seed=99)
    k = kernel_matrix(KernelSpec("rbf", gamma=0.2), Standardizer.fit(x)(x))
    t0 = time.perf_counter()
    np.linalg.eigh(k)
    return time.perf_counter() - t0


def _tuned(x, y, kernel: str) -> tuple[float, dict, object]:
    t0 = time.perf_counter()
    tuned = search.tune(x, y, kernel=kernel, quiet=True, log=lambda *_: None)
    return time.perf_counter() - t0, tuned.account, tuned


def ratios(rows: int) -> dict:
    """tune() time over one eigh of the same size (module notes, part ``ratios``)."""
    out = {}
    print(f"{'case':22}{'tune s':>9}{'eigh s':>8}{'ratio':>7}{'eigh':>6}{'chol':>6}  chosen")
    for n, kernel in ((rows, "rbf"), (rows, "auto"), (rows - 100, "rbf"), (rows + 100, "rbf")):
        x, y = plant(n, seed=0)
        e = _eigh_seconds(n)
        t, acc, tuned = _tuned(x, y, kernel)
        key = f"{n} {kernel}"
        out[key] = {"tune_s": t, "eigh_s": e, "ratio": t / e,
                    "decompositions": acc["decompositions"],
                    "factorizations": acc.get("factorizations", 0)}
        print(f"{key:22}{t:9.1f}{e:8.1f}{t / e:7.2f}{acc['decompositions']:6d}"
              f"{acc.get('factorizations', 0):6d}  {tuned.spec.describe()} "
              f"ridge={tuned.ridge:.3g} ({acc['error_method']})")
    one, auto = out[f"{rows} rbf"]["ratio"], out[f"{rows} auto"]["ratio"]
    low, high = out[f"{rows - 100} rbf"], out[f"{rows + 100} rbf"]
    print(f"one kernel {one:.2f} eighs (target <= 4); auto / one kernel {auto / one:.2f} "
          f"(target <= 2.5); eighs of their own size at {rows - 100} rows {low['ratio']:.2f}, "
          f"at {rows + 100} rows {high['ratio']:.2f}; seconds {rows + 100} / {rows - 100} "
          f"{high['tune_s'] / low['tune_s']:.2f} (the load moves this one)")
    return out


def _table_sets(rows: int) -> list[tuple[str, np.ndarray, np.ndarray, int]]:
    from sklearn.datasets import load_diabetes

    sets = [("plant", *plant(rows + 2000, seed=1)), ("competing", *competing(rows + 2000, seed=2)),
            ("fine_sine", *fine_sine(rows + 2000, seed=3))]
    xf, yf = make_friedman1(n_samples=rows + 2000, noise=1.0, random_state=0)
    sets.append(("friedman1", xf, yf[:, None]))
    xd, yd = load_diabetes(return_X_y=True)
    sets.append(("diabetes", xd, yd[:, None]))
    return [(name, x, y, rows if name != "diabetes" else 353) for name, x, y in sets]


def _full_search():
    """The search without subsample or race (module notes, part ``table``)."""
    from trainer.tuning import race

    saved = race.COARSE_ROWS, race.COARSE_MARGIN
    race.COARSE_ROWS, race.COARSE_MARGIN = 10**9, 1.0
    return lambda: setattr(race, "COARSE_ROWS", saved[0]) or setattr(
        race, "COARSE_MARGIN", saved[1])


def table(rows: int) -> list[dict]:
    """Held-out RMSE of the race's choice against the full search's."""
    out = []
    print(f"{'data':11}{'kernel':8}{'rows':>6}{'race s':>8}{'full s':>8}{'race RMSE':>11}"
          f"{'full RMSE':>11}{'ratio':>7}  race's choice / full search's choice")
    for name, x, y, n in _table_sets(rows):
        for kernel in ("rbf", "auto"):
            res = {}
            for how in ("race", "full"):
                undo = _full_search() if how == "full" else (lambda: None)
                try:
                    t, acc, tuned = _tuned(x[:n], y[:n], kernel)
                finally:
                    undo()
                model = fit_exact(x[:n], y[:n], tuned.spec, tuned.ridge)
                rmse = float(np.sqrt(np.mean((model.predict(x[n:]) - y[n:]) ** 2)))
                res[how] = (t, rmse, f"{tuned.spec.describe()} ridge={tuned.ridge:.3g}")
            row = {"data": name, "kernel": kernel, "rows": n, "race_s": res["race"][0],
                   "full_s": res["full"][0], "race_rmse": res["race"][1],
                   "full_rmse": res["full"][1], "ratio": res["race"][1] / res["full"][1]}
            out.append(row)
            print(f"{name:11}{kernel:8}{n:6d}{row['race_s']:8.1f}{row['full_s']:8.1f}"
                  f"{row['race_rmse']:11.4f}{row['full_rmse']:11.4f}{row['ratio']:7.3f}  "
                  f"{res['race'][2]} / {res['full'][2]}")
    print(f"worst held-out ratio race / full {max(r['ratio'] for r in out):.4f} "
          "(target <= 1.02)")
    return out


def against_sklearn(rows: int, fresh: int) -> dict:
    """The LOO grid against GridSearchCV (module notes, part ``sklearn``)."""
    args = argparse.Namespace(rows=rows, fresh=fresh)
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
    return {"rows": args.rows, "ours_s": t_ours, "reference_s": t_ref,
            "ratio_reference_to_ours": t_ref / t_ours,
            "ratio_rmse_ours_to_reference": rmse_ours / rmse_ref}



def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--parts", default="ratios,table,sklearn")
    ap.add_argument("--rows", type=int, default=4000, help="training rows of part ratios")
    ap.add_argument("--table-rows", type=int, default=1500)
    ap.add_argument("--sklearn-rows", type=int, default=3000)
    ap.add_argument("--fresh", type=int, default=2000)
    ap.add_argument("--eigh-sizes", default="",
                    help="comma-separated sizes to time one eigendecomposition at")
    add_json_option(ap)
    args = ap.parse_args()
    parts = args.parts.split(",")
    print(header("tuning bench: search cost in eighs, answer against the full search, "
                 "GridSearchCV(KernelRidge)"))
    if args.eigh_sizes:
        eigh_seconds([int(v) for v in args.eigh_sizes.split(",")])
    figures = {}
    if "ratios" in parts:
        figures["ratios"] = ratios(args.rows)
    if "table" in parts:
        figures["table"] = table(args.table_rows)
    if "sklearn" in parts:
        figures.update(against_sklearn(args.sklearn_rows, args.fresh))
    save(args.json, "tuning", figures)


if __name__ == "__main__":
    main()
