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


def _at_edge(full, best: Curve, ridge: float, given_ridge: bool) -> bool:
    """The chosen ridge sits at an end of the range searched."""
    if given_ridge:
        return False
    if full is None:
        return best.ridges.size == RIDGE_GRID_SIZE and best.best in (0, best.ridges.size - 1)
    lo, hi = full.ridge_limits(best.spec)
    return min(math.log(ridge) - lo, hi - math.log(ridge)) < RIDGE_TOL


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
                   "ridge_at_grid_edge": _at_edge(full, best, ridge, given.ridge is not None)},
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
