"""Automatic choice of kernel parameters and ridge by cross-validated error.

Each candidate kernel setting is scored for a whole ridge grid at once
(:mod:`trainer.exact.candidates`), by exact leave-one-out up to a size limit, by k-fold on a
subsample above it, by forward-chaining folds in time order with ``--time``
(:mod:`trainer.validation.folds`); the closed forms are in :mod:`trainer.exact.loo`.

The search
----------
* kernel widths (γ) on a log scale whose ends follow the data (:mod:`trainer.tuning.widths`): a
  coarse grid of 8 widths, extended outwards when the best lies on an edge, then refined by
  two rounds of log-scale bisection around the best;
* ridge: 30 values from 1e-7 to 1e3 times the mean diagonal of K (for rbf-type kernels the
  diagonal is 1, so these are plain ridge values), then a finer grid between the best value's
  neighbours on the best kernel's decomposition;
* polynomial degree (2, 3) and, for the sigmoid kernel, coef0 (0, 1) when omitted. The
  polynomial coef0 is fixed to 1 when omitted: for c₀ > 0, (γ aᵀb + c₀)^d = c₀^d (γ/c₀ aᵀb + 1)^d,
  so any positive c₀ is the same model as c₀ = 1 with another γ and ridge;
* ``kernel="auto"`` compares linear, polynomial, rbf, laplacian, Matérn 3/2 and 5/2 by the
  same criterion. The sigmoid kernel is not positive semi-definite in general and is only
  tuned when asked for by name.

Several targets: the criterion is the mean over targets of CV MSE / Var(target), so targets
in different units weigh the same. The manifest gets the whole account (:func:`tune`).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass

import numpy as np

from service.kernels import KERNEL_PARAMS, KernelSpec
from trainer.errors import UserError
from trainer.exact.candidates import Curve, evaluate
from trainer.tuning.widths import width_range
from trainer.tuning.workers import Runner
from trainer.validation.folds import (
    RIDGE_GRID_SIZE,
    RIDGE_RELATIVE,
    Problem,
    error_method,
    scheme_text,
    standardized_problem,
)

#: Coarse grid of kernel widths, edge extensions and bisection rounds.
WIDTH_GRID_SIZE = 8
WIDTH_EXTENSIONS = 2
WIDTH_BISECTIONS = 2
#: Kernels compared by ``kernel="auto"`` (sigmoid is indefinite in general: asked-for only).
AUTO_KERNELS = ("linear", "polynomial", "rbf", "laplacian", "matern32", "matern52")

# search_widths and kernel_candidates also drive the Nyström job's sample tuning.
__all__ = ["AUTO_KERNELS", "Given", "Tuned", "kernel_candidates", "search_widths", "tune"]


@dataclass(frozen=True)
class Given:
    """Parameters the user fixed; None means "search it"."""

    gamma: float | None = None
    degree: float | None = None
    coef0: float | None = None
    ridge: float | None = None


@dataclass(frozen=True)
class Tuned:
    """The outcome of :func:`tune`."""

    spec: KernelSpec  # the chosen kernel and its parameters
    ridge: float
    account: dict  # JSON-ready account of the search, stored as the manifest's "tuning"


def search_widths(problem, base: dict, name: str, runner, seed: int) -> tuple[list[Curve], list]:
    """Coarse log grid of γ, edge extensions, then log bisection around the best."""
    lo, hi = width_range(name, problem.x_s, seed)
    grid = list(np.geomspace(lo, hi, WIDTH_GRID_SIZE))
    make = lambda g: KernelSpec(name, gamma=float(g), **base)  # noqa: E731
    curves = runner(problem, [make(g) for g in grid])
    step = math.log(grid[1] / grid[0])
    # extend outwards while the best lies on an edge of what has been tried
    for _ in range(WIDTH_EXTENSIONS):
        gammas = [c.spec.gamma for c in curves]
        best = curves[int(np.argmin([c.best_score for c in curves]))]
        if best.spec.gamma == min(gammas):
            new = min(gammas) * math.exp(-step)
        elif best.spec.gamma == max(gammas):
            new = max(gammas) * math.exp(step)
        else:
            break
        curves += runner(problem, [make(new)])
    for _ in range(WIDTH_BISECTIONS):
        step /= 2
        best = curves[int(np.argmin([c.best_score for c in curves]))]
        g = best.spec.gamma
        curves += runner(problem, [make(g * math.exp(-step)), make(g * math.exp(step))])
    return curves, [float(lo), float(hi)]


def kernel_candidates(name: str, given) -> list[dict]:
    """Fixed non-width parameters to try for one kernel (explicit ones honoured).

    ``given`` has ``degree`` and ``coef0`` attributes (:class:`Given` or the train options).
    """
    wanted = KERNEL_PARAMS[name]
    degrees = [given.degree] if given.degree is not None else [2.0, 3.0]
    if given.coef0 is not None:
        coefs = [given.coef0]
    else:  # polynomial: c₀ > 0 is a rescaling of γ and ridge (module notes); sigmoid: shifts
        coefs = [1.0] if name == "polynomial" else [0.0, 1.0]
    out = [{}]
    if "degree" in wanted:
        out = [dict(o, degree=float(d)) for o in out for d in degrees]
    if "coef0" in wanted:
        out = [dict(o, coef0=float(c)) for o in out for c in coefs]
    return out


def _refine_ridge(problem: Problem, curve: Curve) -> Curve:
    """Finer ridge grid between the best grid value's neighbours (one more decomposition)."""
    r = curve.ridges
    if r.size < 3:
        return curve
    b = curve.best
    lo, hi = r[max(b - 1, 0)], r[min(b + 1, r.size - 1)]
    fine = evaluate(problem, curve.spec, np.geomspace(lo, hi, 17))
    return fine if fine.best_score < curve.best_score else curve


def tune(x_tr: np.ndarray, y_tr: np.ndarray, *, kernel: str = "rbf",
         given: Given = Given(), seed: int = 0, quiet: bool = False, log=print,
         time_ordered: bool = False) -> Tuned:
    """Choose the omitted kernel parameters and ridge on the training rows.

    Parameters
    ----------
    x_tr : (n, d) raw training features (standardized here, as the final fit does).
    y_tr : (n, t) training targets.
    kernel : a kernel name, or ``"auto"`` to compare :data:`AUTO_KERNELS`.
    given : parameters used exactly; the omitted ones are searched.
    seed : seeds the width-range sample and the fallback subsample.
    quiet : no progress bar.
    log : one-line progress messages.
    time_ordered : rows are in time order: blocked cross-validation in time order
        replaces leave-one-out, which is optimistic on an autocorrelated series.
    """
    t0 = time.perf_counter()
    n = x_tr.shape[0]
    if n < 3:
        raise UserError(f"{n} training rows are too few to tune; give --gamma and --ridge")
    if given.ridge is not None and not given.ridge > 0:
        raise UserError(f"ridge must be positive for tuning, got {given.ridge}")
    kernels = list(AUTO_KERNELS) if kernel == "auto" else [kernel]
    problem, info = standardized_problem(x_tr, y_tr, given.ridge, seed, time_ordered)
    widths_searched = given.gamma is None
    per_kernel_fits = (WIDTH_GRID_SIZE + WIDTH_EXTENSIONS + 2 * WIDTH_BISECTIONS)
    hint = sum((per_kernel_fits if "gamma" in KERNEL_PARAMS[k] and widths_searched else 1)
               * len(kernel_candidates(k, given)) for k in kernels)
    runner = Runner(problem.x_s.shape[0], quiet, hint)
    what = scheme_text(info)
    if info["fallback"]:
        log(f"tuning: {info['fallback']['reason']}; falling back to {what}")
    log(f"tuning {', '.join(kernels)} by {what} on {problem.x_s.shape[0]} rows; {runner.how}")

    curves: list[Curve] = []
    ranges: dict[str, list[float]] = {}
    try:
        for name in kernels:
            for base in kernel_candidates(name, given):
                if "gamma" in KERNEL_PARAMS[name] and widths_searched:
                    got, ranges[name] = search_widths(problem, base, name, runner, seed)
                else:
                    gamma = {"gamma": float(given.gamma)} if "gamma" in KERNEL_PARAMS[name] else {}
                    got = runner(problem, [KernelSpec(name, **gamma, **base)])
                curves += got
    finally:
        runner.close()
    best = min(curves, key=lambda c: c.best_score)
    failures = [c for c in curves if c.failure]
    if failures:
        log(f"tuning: {len(failures)} of {len(curves)} candidates failed numerically "
            f"(first: {failures[0].spec.describe()}, {failures[0].failure})")
    if not math.isfinite(best.best_score):
        raise UserError(f"tuning found no usable parameters ({len(failures)} of {len(curves)} "
                        "candidates failed numerically, the rest were ill-conditioned at every "
                        "ridge); give --gamma and --ridge explicitly")
    if given.ridge is None:
        best = _refine_ridge(problem, best)
    ridge = float(given.ridge) if given.ridge is not None else float(best.ridges[best.best])
    info.update(_account(problem, curves, best, ridge, kernels, kernel, given, what, ranges,
                         y_tr.shape[1], runner.how, time.perf_counter() - t0,
                         error_method(info)))
    log(f"tuning: {info['summary']}")
    return Tuned(best.spec, ridge, info)


def _account(problem: Problem, curves: list[Curve], best: Curve, ridge: float,
             kernels: list[str], kernel: str, given: Given, what: str,
             ranges: dict, targets: int, how: str, seconds: float, error: str) -> dict:
    """The JSON-ready account of a finished search (the manifest's ``tuning``)."""
    spec = best.spec
    chosen_rmse = [float(v) for v in best.rmse[best.best]]
    failures = sum(1 for c in curves if c.failure)
    per_kernel = {}
    for name in kernels:
        b = min((c for c in curves if c.spec.name == name), key=lambda c: c.best_score)
        per_kernel[name] = {
            "params": b.spec.params(), "ridge": float(b.ridges[b.best]),
            "score": b.best_score if math.isfinite(b.best_score) else None,
            "rmse": [float(v) for v in b.rmse[b.best]],
        }
    cv = problem.folds is not None
    crit_txt = f"{error} MSE" + (
        " / Var(target), averaged over the targets" if targets > 1 else "")
    searched = [p for p in ("gamma", "degree", "coef0")
                if any(p in KERNEL_PARAMS[k] for k in kernels) and getattr(given, p) is None]
    searched += ["ridge"] if given.ridge is None else []
    searched += ["kernel"] if kernel == "auto" else []
    rmse_txt = ", ".join(f"{v:.4g}" for v in chosen_rmse)
    summary = (f"{spec.describe()}, ridge={ridge:.4g} chosen by {what} "
               f"({problem.evaluated} decompositions, {len(curves)} settings × ridge grid; "
               f"{error} RMSE {rmse_txt}; {seconds:.1f} s)")
    return {
        "method": what + ("" if cv else
                          " (closed form from one eigendecomposition per kernel setting)"),
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
            "gamma_range": ranges,
        },
        "chosen": {"kernel": spec.name, "params": spec.params(), "ridge": ridge,
                   "score": best.best_score, "rmse": chosen_rmse,
                   "ridge_at_grid_edge": bool(given.ridge is None
                                              and best.ridges.size == RIDGE_GRID_SIZE
                                              and best.best in (0, best.ridges.size - 1))},
        "per_kernel": per_kernel,
        "curves": [c.as_json() for c in curves],
        "decompositions": problem.evaluated,
        "numerical_failures": failures,
        "parallel": how,
        "seconds": round(seconds, 3),
        "summary": summary,
    }
