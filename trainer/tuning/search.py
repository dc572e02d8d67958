"""Automatic choice of kernel parameters and ridge by cross-validated error.

Each candidate kernel setting is scored by exact leave-one-out up to a size limit, by k-fold
on a subsample above it, by forward-chaining folds in time order with ``--time``
(:mod:`trainer.validation.folds`); the closed forms are in :mod:`trainer.exact.loo` (a whole
ridge path from one eigendecomposition) and :mod:`trainer.exact.cholesky_score` (one ridge
from one Cholesky factorization).

The search
----------
* a race between the kernel settings (:mod:`trainer.tuning.race`): on problems of more than
  1,000 rows, widths and kernels are first searched on a seeded 1,000-row subsample by exact
  leave-one-out, and the few settings left settle ridge and width on all tuning rows by
  Cholesky line searches (:mod:`trainer.tuning.full_size`); smaller problems, and time
  folds, are searched whole;
* kernel widths (γ) on a log scale whose ends follow the data (:mod:`trainer.tuning.widths`): a
  coarse grid of 8 widths, extended outwards when the best lies on an edge, then refined by
  two rounds of log-scale bisection around the best (:mod:`trainer.tuning.width_search`);
* ridge: 30 values from 1e-7 to 1e3 times the mean diagonal of K (for rbf-type kernels the
  diagonal is 1, so these are plain ridge values), then a finer grid between the best value's
  neighbours (searched whole) or a Brent line search (on all rows after a subsample);
* polynomial degree (2, 3) and, for the sigmoid kernel, coef0 (0, 1) when omitted. The
  polynomial coef0 is fixed to 1 when omitted: for c₀ > 0, (γ aᵀb + c₀)^d = c₀^d (γ/c₀ aᵀb + 1)^d,
  so any positive c₀ is the same model as c₀ = 1 with another γ and ridge;
* ``kernel="auto"`` compares linear, polynomial, rbf, laplacian, Matérn 3/2 and 5/2 by the
  same criterion. The sigmoid kernel is not positive semi-definite in general and is only
  tuned when asked for by name.

Several targets searched together (``--shared-kernel``; by default each target gets its own
search, :mod:`trainer.tuning.each_target`): the criterion is the mean over targets of CV
MSE / Var(target), so targets in different units weigh the same. The manifest gets the whole account
(:mod:`trainer.tuning.account`).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass

import numpy as np

from service.kernels import KERNEL_PARAMS, KernelSpec
from trainer.errors import UserError
from trainer.exact.candidates import Curve, evaluate
from trainer.tuning import race
from trainer.tuning.account import account
from trainer.tuning.full_size import FullSize
from trainer.tuning.width_search import (
    WIDTH_BISECTIONS,
    WIDTH_EXTENSIONS,
    WIDTH_GRID_SIZE,
    search_widths,
)
from trainer.tuning.workers import Runner
from trainer.validation.folds import Problem, error_method, scheme_text, standardized_problem

#: Kernels compared by ``kernel="auto"`` (sigmoid is indefinite in general: asked-for only).
AUTO_KERNELS = ("linear", "polynomial", "rbf", "laplacian", "matern32", "matern52")

# search_widths and kernel_candidates also drive the Nyström job's sample tuning.
__all__ = ["AUTO_KERNELS", "WIDTH_BISECTIONS", "WIDTH_EXTENSIONS", "WIDTH_GRID_SIZE", "Given",
           "Tuned", "kernel_candidates", "search_widths", "tune"]


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
         time_ordered: bool = False, groups: np.ndarray | None = None) -> Tuned:
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
    groups : (n,) group codes (``--group``): k-fold over whole groups replaces
        leave-one-out, which would score a row with its copies in the fit.
    """
    t0 = time.perf_counter()
    n = x_tr.shape[0]
    if n < 3:
        raise UserError(f"{n} training rows are too few to tune; give --gamma and --ridge")
    if given.ridge is not None and not given.ridge > 0:
        raise UserError(f"ridge must be positive for tuning, got {given.ridge}")
    kernels = list(AUTO_KERNELS) if kernel == "auto" else [kernel]
    problem, info = standardized_problem(x_tr, y_tr, given.ridge, seed, time_ordered, groups)
    entries = _entries(kernels, given)
    coarse = race.coarse_problem(problem, seed)
    first = coarse or problem
    per_entry = WIDTH_GRID_SIZE + WIDTH_EXTENSIONS + 2 * WIDTH_BISECTIONS
    hint = first.decompositions * sum(per_entry if e.widths else 1 for e in entries)
    runner = Runner(first.x_s.shape[0], quiet, hint)
    what = scheme_text(info)
    if info["fallback"]:
        log(f"tuning: {info['fallback']['reason']}; falling back to {what}")
    log(f"tuning {', '.join(kernels)} by {what} on {problem.x_s.shape[0]} rows"
        + (f" (widths and kernels first on a {coarse.x_s.shape[0]}-row subsample)"
           if coarse else "") + f"; {runner.how}")
    full = None
    try:
        race.coarse_stage(first, entries, runner, seed)
        _check_usable([c for e in entries for c in e.curves], log)
        if coarse is None:
            best = _whole_choice(problem, entries, given, runner)
        else:
            full = FullSize(problem, runner.step)
            runner.expect(race.MAX_FINALISTS * 3 * race.STEPS_PER_SEARCH
                          * problem.decompositions)
            spec, _, score = race.full_stage(full, entries, runner)
            if not math.isfinite(score):
                raise UserError("tuning found no ridge at which the kernel system of all "
                                "tuning rows is well-conditioned; give --gamma and --ridge "
                                "explicitly")
            best = next(c for c in full.curves() if c.spec == spec)
    finally:
        runner.close()
    ridge = float(given.ridge) if given.ridge is not None else float(best.ridges[best.best])
    info.update(account(problem, coarse, entries, full, best, ridge, kernels, kernel, given,
                        what, runner.how, time.perf_counter() - t0, error_method(info)))
    log(f"tuning: {info['summary']}")
    return Tuned(best.spec, ridge, info)


def _entries(kernels: list[str], given: Given) -> list[race.Entry]:
    """One race entry per kernel setting to try."""
    out = []
    for name in kernels:
        widths = "gamma" in KERNEL_PARAMS[name] and given.gamma is None
        fixed = ({"gamma": float(given.gamma)}
                 if "gamma" in KERNEL_PARAMS[name] and not widths else {})
        out += [race.Entry(name, base, widths, fixed=fixed)
                for base in kernel_candidates(name, given)]
    return out


def _whole_choice(problem: Problem, entries: list[race.Entry], given: Given,
                  runner: Runner) -> Curve:
    """The best curve of a problem searched whole, its ridge refined."""
    best = min((c for e in entries for c in e.curves), key=lambda c: c.best_score)
    if given.ridge is not None:
        return best
    before = problem.evaluated
    best = _refine_ridge(problem, best)
    runner.count_eigh(problem.evaluated - before)
    return best


def _check_usable(curves: list[Curve], log) -> None:
    """Say how many candidates failed numerically; refuse when nothing usable is left."""
    failures = [c for c in curves if c.failure]
    if failures:
        log(f"tuning: {len(failures)} of {len(curves)} candidates failed numerically "
            f"(first: {failures[0].spec.describe()}, {failures[0].failure})")
    if not any(math.isfinite(c.best_score) for c in curves):
        raise UserError(f"tuning found no usable parameters ({len(failures)} of {len(curves)} "
                        "candidates failed numerically, the rest were ill-conditioned at every "
                        "ridge); give --gamma and --ridge explicitly")
