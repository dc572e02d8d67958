"""The account of a finished search: the manifest's ``tuning`` record.

``decompositions`` counts eigendecompositions (each buys a whole ridge path), and
``factorizations`` counts Cholesky factorizations (each scores one ridge; one per fold for
k-fold); both include the coarse stage's. ``raced_out`` names the kernel settings that left
the race and where. ``curves`` hold what was scored on the tuning problem itself, with
its error method; ``coarse_curves`` what the coarse stage scored on its subsample (by
exact leave-one-out there).
"""

from __future__ import annotations

import math

import numpy as np

from service.kernels import KERNEL_PARAMS
from trainer.exact.candidates import Curve
from trainer.tuning.full_size import RIDGE_TOL
from trainer.tuning.width_search import WIDTH_BISECTIONS, WIDTH_EXTENSIONS, WIDTH_GRID_SIZE
from trainer.validation.folds import RIDGE_GRID_SIZE, RIDGE_RELATIVE, Problem


def _best_of(curves: list[Curve]) -> Curve:
    return min(curves, key=lambda c: c.best_score)


def _kernel_entry(best: Curve, rows: int, raced_out: str | None) -> dict:
    out = {"params": best.spec.params(), "ridge": float(best.ridges[best.best]),
           "score": best.best_score if math.isfinite(best.best_score) else None,
           "rmse": [float(v) for v in best.rmse[best.best]], "rows": rows}
    if raced_out:
        out["raced_out"] = raced_out
    return out


def per_kernel(kernels: list[str], entries, curves: list[Curve], rows: int,
               coarse_rows: int) -> dict:
    """Each kernel's best: on the tuning rows where it reached them, else where it left the
    race (``rows`` says how many rows the score was measured on)."""
    out = {}
    for name in kernels:
        own = [c for c in curves if c.spec.name == name]
        mine = [e for e in entries if e.name == name]
        out_at = (mine[0].raced_out if mine and all(e.raced_out for e in mine) else None)
        if own:
            out[name] = _kernel_entry(_best_of(own), rows, out_at)
        else:
            best = _best_of([c for e in mine for c in e.curves])
            out[name] = _kernel_entry(best, coarse_rows, out_at)
    return out


def _same_family(a, b) -> bool:
    """Two kernel settings that differ at most in their width γ."""
    pa, pb = dict(a.params()), dict(b.params())
    pa.pop("gamma", None), pb.pop("gamma", None)
    return a.name == b.name and pa == pb


def _ridge_edge(full, scored: list[Curve], best: Curve, ridge: float,
                given_ridge: bool) -> dict | None:
    """{side, range} when the chosen ridge sits at an end of the range searched, else None.

    Searched whole: the ridge lies below the grid's second value or above its next-to-last
    (the grid's best was an end point, whatever the finer grid around it found). Settled on
    all rows: within the line search's tolerance of the grid's limits.
    """
    if given_ridge:
        return None
    if full is None:
        grid = np.unique(np.concatenate([c.ridges for c in scored if c.spec == best.spec]))
        if grid.size < 3:
            return None
        lo, hi = float(grid[0]), float(grid[-1])
        side = "lower" if ridge < grid[1] else "upper" if ridge > grid[-2] else None
    else:
        lo, hi = (math.exp(v) for v in full.ridge_limits(best.spec))
        u = math.log(ridge)
        side = ("lower" if u - math.log(lo) < RIDGE_TOL else
                "upper" if math.log(hi) - u < RIDGE_TOL else None)
    return {"side": side, "range": [lo, hi]} if side else None


def _width_edge(scored: list[Curve], best: Curve, searched: bool) -> dict | None:
    """{side, value, range, scored} when the chosen γ is the smallest or largest width
    scored for its kernel setting (coarse grid, extensions, bisections, line searches)."""
    gamma = getattr(best.spec, "gamma", None)
    if not searched or gamma is None:
        return None
    tried = sorted({c.spec.gamma for c in scored if _same_family(c.spec, best.spec)})
    if len(tried) < 3:
        return None
    side = "lower" if gamma <= tried[0] else "upper" if gamma >= tried[-1] else None
    return ({"side": side, "value": float(gamma), "range": [tried[0], tried[-1]],
             "scored": len(tried)} if side else None)


def _method(what: str, cv: bool, coarse: Problem | None, n: int) -> str:
    text = what + ("" if cv else " (closed form from one eigendecomposition per kernel setting "
                   "for a whole ridge path, or one Cholesky factorization per ridge)")
    if coarse is not None:
        text += (f"; widths and kernels first raced by exact leave-one-out on a seeded "
                 f"{coarse.x_s.shape[0]}-row subsample, then ridge and width settled on all "
                 f"{n} rows by Brent line searches")
    return text


def account(problem: Problem, coarse: Problem | None, entries, full, best: Curve,
            ridge: float, kernels: list[str], kernel: str, given, what: str, how: str,
            seconds: float, error: str) -> dict:
    """The JSON-ready account of a finished search (module notes)."""
    spec = best.spec
    n = problem.x_s.shape[0]
    coarse_curves = [c for e in entries for c in e.curves]
    curves = full.curves() if full is not None else coarse_curves
    chosen_rmse = [float(v) for v in best.rmse[best.best]]
    failures = sum(1 for c in coarse_curves if c.failure)
    targets = problem.y_c.shape[1]
    crit_txt = f"{error} MSE" + (
        " / Var(target), averaged over the targets" if targets > 1 else "")
    searched = [p for p in ("gamma", "degree", "coef0")
                if any(p in KERNEL_PARAMS[k] for k in kernels) and getattr(given, p) is None]
    searched += ["ridge"] if given.ridge is None else []
    searched += ["kernel"] if kernel == "auto" else []
    raced = [{"kernel": e.name, "params": e.best.spec.params(), "stage": e.raced_out}
             for e in entries if e.raced_out]
    decompositions = problem.evaluated + (coarse.evaluated if coarse is not None else 0)
    rmse_txt = ", ".join(f"{v:.4g}" for v in chosen_rmse)
    summary = (f"{spec.describe()}, ridge={ridge:.4g} chosen by {what} "
               f"({decompositions} decompositions, {problem.factorizations} factorizations, "
               f"{len(coarse_curves) + (len(curves) if full else 0)} settings scored, "
               f"{len(raced)} raced out; {error} RMSE {rmse_txt}; {seconds:.1f} s)")
    coarse_rows = coarse.x_s.shape[0] if coarse is not None else n
    scored = coarse_curves + (curves if full is not None else [])
    ridge_edge = _ridge_edge(full, scored, best, ridge, given.ridge is not None)
    return {
        "method": _method(what, problem.folds is not None, coarse, n),
        "criterion": crit_txt,
        "error_method": error,
        "error_label": f"{error} RMSE",
        "searched": searched,
        "fixed": {p: float(getattr(given, p)) for p in ("gamma", "degree", "coef0", "ridge")
                  if getattr(given, p) is not None},
        "kernels": kernels,
        "grid": {
            "ridge": ("fixed" if given.ridge is not None else
                      f"{RIDGE_GRID_SIZE} log-spaced values, {RIDGE_RELATIVE[0]:g} to "
                      f"{RIDGE_RELATIVE[1]:g} × mean diagonal of K, refined around the best"),
            "gamma": (None if given.gamma is not None else
                      f"{WIDTH_GRID_SIZE} log-spaced widths between 0.05/q90 of the pairwise "
                      f"distances and 3/median nearest-neighbour distance, up to "
                      f"{WIDTH_EXTENSIONS} edge extensions, {WIDTH_BISECTIONS} bisections"),
            "gamma_range": {e.name: e.span for e in entries if e.span},
        },
        "chosen": {"kernel": spec.name, "params": spec.params(), "ridge": ridge,
                   "score": best.best_score, "rmse": chosen_rmse, "rows": n,
                   "ridge_at_grid_edge": ridge_edge is not None, "ridge_edge": ridge_edge,
                   "width_edge": _width_edge(scored, best, "gamma" in searched)},
        "per_kernel": per_kernel(kernels, entries, curves, n, coarse_rows),
        "curves": [c.as_json() for c in curves],
        "coarse_curves": [c.as_json() for c in coarse_curves] if full is not None else None,
        "coarse_rows": coarse_rows if full is not None else None,
        "decompositions": decompositions,
        "factorizations": problem.factorizations,
        "raced_out": raced,
        "numerical_failures": failures,
        "parallel": how,
        "seconds": round(seconds, 3),
        "summary": summary,
    }
