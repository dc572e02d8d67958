"""Kernel and ridge for a Nyström fit, chosen on rows of pass 1's sample.

The width search is exact tuning's (:mod:`trainer.tuning.search`: the same data-driven range, log
grid, edge extensions and bisections); each kernel setting costs one eigendecomposition of
K_mm and one of the m × m normal matrix, which then serve every ridge value. After pass 2
the ridge is chosen once more with the sums of all training rows against the validation part.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING

import numpy as np

from service.kernels import KERNEL_PARAMS, KernelSpec
from trainer.errors import UserError
from trainer.nystrom import numerics
from trainer.nystrom.rank import rank_guard

if TYPE_CHECKING:
    from trainer.exact.candidates import Curve
    from trainer.plan import Parameters

#: Rows of the sample the width search fits on (the rest of the tuning rows validate).
TUNE_ROWS = 24_000
#: Landmarks of the first stage of the width search (see :func:`tune_on_sample`).
COARSE_LANDMARKS = 1000
#: Width ratio between the second stage's steps, and how often it may step outwards.
FINE_STEP = math.sqrt(2.0)
FINE_EXTENSIONS = 2
#: Landmarks of the second stage at most: above, a uniform subset of this many decides the
#: width (two m × m eigendecompositions per width step cost m³; the CG solver's m of 10,000
#: would take minutes per step), and the final solve uses every landmark.
FINE_MAX_LANDMARKS = 2500


@dataclass
class SampleProblem:
    """Tuning rows from the sample: fit part and validation part (standardized)."""

    x_s: np.ndarray  # the fit rows (named as trainer.tuning.search's width search expects)
    y: np.ndarray
    x_val: np.ndarray
    y_val: np.ndarray
    landmarks: np.ndarray
    inv_var: np.ndarray
    ridge_fixed: float | None
    evaluated: int = 0


def sample_problem(x_s: np.ndarray, y: np.ndarray, times: np.ndarray | None,
                   landmarks: np.ndarray, ridge_fixed: float | None,
                   rng: np.random.Generator) -> SampleProblem:
    """Fit and validation rows from the sample's training rows: a random three-to-one split,
    or with ``times`` the latest rows, the last quarter of them validating."""
    take_n = int(TUNE_ROWS / 0.75)
    if times is not None:
        take = np.argsort(times, kind="stable")[-take_n:]
    else:
        take = rng.permutation(x_s.shape[0])[:take_n]
    cut = int(round(0.75 * take.size))
    fit_i, val_i = take[:cut], take[cut:]
    var = y.var(axis=0)
    var[var <= 0] = 1.0
    return SampleProblem(x_s[fit_i], y[fit_i], x_s[val_i], y[val_i], landmarks, 1.0 / var,
                         ridge_fixed)


def _evaluate(problem: SampleProblem, spec: KernelSpec, ridges: np.ndarray | None = None):
    from trainer.exact.candidates import Curve
    from trainer.validation.folds import RIDGE_GRID_SIZE, RIDGE_RELATIVE

    if ridges is None:
        ridges = (np.array([problem.ridge_fixed]) if problem.ridge_fixed is not None
                  else np.geomspace(*RIDGE_RELATIVE, RIDGE_GRID_SIZE))
    path = numerics.ridge_path(spec, problem.landmarks,
                              numerics.accumulate(spec, problem.landmarks, problem.x_s, problem.y))
    res = numerics.validation_errors(path, spec, problem.landmarks, problem.x_val,
                                    problem.y_val, ridges)
    mse = np.mean(res**2, axis=1)
    score = (mse * problem.inv_var[None, :]).mean(axis=1)
    score[~np.isfinite(score)] = np.inf
    return Curve(spec, np.asarray(ridges, dtype=np.float64), score, np.sqrt(mse))


def _run_specs(problem: SampleProblem, specs: list[KernelSpec]) -> list[Curve]:
    """Curves of several kernel settings, one after another.

    Not side by side in threads: scipy's LAPACK wrappers hold the GIL, so two threads'
    eigendecompositions would run one at a time on one core each; one at a time, BLAS uses
    every core.
    """
    problem.evaluated += 2 * len(specs)  # K_mm and the normal matrix, per setting
    return [_evaluate(problem, s) for s in specs]


def _refine_width(problem: SampleProblem, coarse: Curve, runner) -> list[Curve]:
    """Width steps of :data:`FINE_STEP` around the coarse choice, with all m landmarks,
    extended while the best lies on an edge (at most :data:`FINE_EXTENSIONS` times)."""
    spec = coarse.spec
    make = lambda g: replace(spec, gamma=float(g))  # noqa: E731
    g0 = spec.gamma
    curves = runner(problem, [make(g0 / FINE_STEP), spec, make(g0 * FINE_STEP)])
    for _ in range(FINE_EXTENSIONS):
        gammas = [c.spec.gamma for c in curves]
        best = min(curves, key=lambda c: c.best_score).spec.gamma
        if best == min(gammas):
            curves += runner(problem, [make(best / FINE_STEP)])
        elif best == max(gammas):
            curves += runner(problem, [make(best * FINE_STEP)])
        else:
            break
    return curves


def _fine_problem(problem: SampleProblem, rng: np.random.Generator) -> SampleProblem:
    """The problem the width steps decide on: all landmarks up to FINE_MAX_LANDMARKS, above
    a uniform subset of that many."""
    m = problem.landmarks.shape[0]
    if m <= FINE_MAX_LANDMARKS:
        return problem
    pick = np.sort(rng.choice(m, FINE_MAX_LANDMARKS, replace=False))
    return replace(problem, landmarks=problem.landmarks[pick], evaluated=0)


def _searched_on(problem: SampleProblem, fine: SampleProblem, two_stage: bool) -> str:
    """The tuning account's words for what the sample search scored on."""
    m = problem.landmarks.shape[0]
    what = (f"validation error on a sample ({problem.x_s.shape[0]} fit rows, "
            f"{problem.x_val.shape[0]} validation rows, the same {m} landmarks)")
    if two_stage:
        what += (f", widths searched with a uniform subset of {COARSE_LANDMARKS} landmarks "
                 f"and refined in steps of ×{FINE_STEP:.3g} with "
                 + (f"all {m}" if fine is problem else
                    f"a uniform subset of {FINE_MAX_LANDMARKS} of the {m}"))
    return what


def tune_on_sample(given: Parameters, seed: int, problem: SampleProblem, log,
                   rng: np.random.Generator | None = None) -> tuple[KernelSpec, float, dict]:
    """Kernel parameters and a first ridge on the sample (same width range as exact tuning).

    With more than :data:`COARSE_LANDMARKS` landmarks the search runs in two stages: exact
    tuning's whole width search (and the choice between kernels) on a uniform subset of
    :data:`COARSE_LANDMARKS` landmarks, where a decomposition costs (m_c/m)³ of a full one;
    then a few width steps around its choice with all m landmarks, which decide.
    """
    from trainer.tuning import search

    t0 = time.perf_counter()
    kernels = list(search.AUTO_KERNELS) if given.kernel == "auto" else [given.kernel]
    runner = _run_specs
    m = problem.landmarks.shape[0]
    two_stage = m > COARSE_LANDMARKS and (given.gamma is None) and any(
        "gamma" in KERNEL_PARAMS[k] for k in kernels)
    coarse = problem
    if two_stage:
        rng = rng or np.random.default_rng(0)
        subset = np.sort(rng.choice(m, COARSE_LANDMARKS, replace=False))
        coarse = replace(problem, landmarks=problem.landmarks[subset], evaluated=0)
    fine = _fine_problem(problem, rng or np.random.default_rng(0))
    curves, ranges = [], {}
    for name in kernels:
        for base in search.kernel_candidates(name, given):
            if "gamma" in KERNEL_PARAMS[name] and given.gamma is None:
                got, ranges[name] = search.search_widths(coarse, base, name, runner,
                                                          seed)
            else:
                gamma = {"gamma": float(given.gamma)} if "gamma" in KERNEL_PARAMS[name] else {}
                got = runner(coarse, [KernelSpec(name, **gamma, **base)])
            curves += got
    best = min(curves, key=lambda c: c.best_score)
    coarse_curves = curves
    if two_stage and math.isfinite(best.best_score):
        if "gamma" in KERNEL_PARAMS[best.spec.name]:
            curves = _refine_width(fine, best, runner)
        else:  # a kernel without a width won on the subset: score it with all landmarks
            curves = runner(fine, [best.spec])
        best = min(curves, key=lambda c: c.best_score)
    if not math.isfinite(best.best_score):
        raise UserError("tuning found no usable parameters on the sample; give --gamma and "
                        "--ridge explicitly")
    guard = None
    if given.gamma is None:
        scored = fine if two_stage else coarse
        best, guard = rank_guard(best, curves, problem.landmarks, seed,
                                 lambda s: runner(scored, [s])[0], FINE_STEP)
    ridge = float(best.ridges[best.best])
    seconds = time.perf_counter() - t0
    evaluated = coarse.evaluated + (fine.evaluated if two_stage else 0)
    what = _searched_on(problem, fine, two_stage)
    rmse = ", ".join(f"{v:.4g}" for v in best.rmse[best.best])
    summary = (f"{best.spec.describe()}, ridge={ridge:.4g} chosen by {what} "
               f"({evaluated} decompositions; validation RMSE {rmse}; {seconds:.1f} s)"
               + (f"; rank guard: {guard['summary']}" if guard else ""))
    log(f"tuning: {summary}")
    info = {
        "method": what + "; one eigendecomposition per kernel setting serves every ridge",
        "criterion": "validation MSE / Var(target), averaged over the targets",
        "error_method": "validation",
        "error_label": "validation RMSE",
        "kernels": kernels,
        "searched": [p for p in ("gamma", "ridge") if getattr(given, p) is None],
        "grid": {"gamma_range": ranges},
        "chosen": {"kernel": best.spec.name, "params": best.spec.params(), "ridge": ridge,
                   "score": best.best_score, "rmse": [float(v) for v in best.rmse[best.best]]},
        "curves": [c.as_json() for c in curves],
        "coarse_curves": [c.as_json() for c in coarse_curves] if two_stage else None,
        "decompositions": evaluated,
        "seconds": round(seconds, 3),
        "summary": summary,
        "rank_guard": guard,
        "fallback": False,
    }
    return best.spec, ridge, info


def final_ridge(path: numerics.RidgePath, spec: KernelSpec, landmarks: np.ndarray,
                held, ridge: float, grow: float, inv_var: np.ndarray) -> float:
    """The ridge once more, with the sums of all training rows, on the validation part.

    41 log-spaced values from ridge/100 to ridge·grow·100: the sample's choice, scaled up to
    ``grow`` times as many rows (the penalty is on a sum over rows), is inside the range.
    The criterion is the tuning's: validation MSE / Var(target) (``inv_var`` = 1 / Var),
    averaged over the targets.
    """
    ridges = np.geomspace(ridge * 1e-2, ridge * max(grow, 1.0) * 1e2, 41)
    res = numerics.validation_errors(path, spec, landmarks, held.x, held.y, ridges)
    score = (np.mean(res**2, axis=1) * inv_var[None, :]).mean(axis=1)
    return float(ridges[int(np.argmin(score))])
