"""The full-size stage of the search: ridge and width settled on every tuning row.

The coarse stage (:mod:`trainer.tuning.race`) has placed each finalist near its best width
γ₀ and ridge λ₀ on a subsample. Here the criterion is evaluated on the real problem one
(γ, λ) point at a time, each point from Cholesky factorizations
(:mod:`trainer.exact.cholesky_score`: one for leave-one-out, one per fold for k-fold), and
moved by bounded Brent line searches on log λ and log γ
(``scipy.optimize.minimize_scalar(method="bounded")``; Brent, *Algorithms for Minimization
without Derivatives*, 1973):

1. ridge at γ₀ over λ₀ · [e^-2.3, e^3.7] (leaning up: the penalty λ‖f‖² competes with a
   sum over rows, which grows with them);
2. width at that ridge over γ₀ · [e^-0.7, e^1.0] (leaning up: more rows usually bear a
   narrower kernel; common practice, and the bracket moves if not);
3. ridge once more, over a factor e either side, where the width moved.

A line search whose best point lies at an end of its bracket moves the bracket past that end
(at most :data:`EDGE_MOVES` times). Every point scored is kept, so the account shows them.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field, replace

import numpy as np
from scipy.optimize import minimize_scalar

from service.kernels import KernelSpec, kernel_matrix
from trainer.exact.candidates import Curve, score_residuals
from trainer.exact.cholesky_score import kfold_point, loo_point
from trainer.validation.folds import RIDGE_RELATIVE, Problem

#: Brackets (natural log of the factor below, above) of the three line searches.
RIDGE_BRACKET = (-2.3, 3.7)
WIDTH_BRACKET = (-0.7, 1.0)
POLISH_BRACKET = (-1.0, 1.0)
#: Their tolerances on the log scale: the criterion is flat near its minimum in λ.
RIDGE_TOL = 0.2
WIDTH_TOL = 0.1
POLISH_TOL = 0.15
#: Points one Brent line search may score, and how often a bracket may move past an end.
STEPS_PER_SEARCH = 12
EDGE_MOVES = 2


@dataclass
class FullSize:
    """Scores (spec, ridge) points on ``problem``; ``step`` is called with the factorizations
    each point ran (the progress bar)."""

    problem: Problem
    step: Callable[[int], None]
    points: dict = field(default_factory=dict)  # spec → {ridge: (score, rmse)}
    _kernel: tuple | None = None  # (spec, K, mean diagonal) of the last spec scored

    def kernel(self, spec: KernelSpec) -> tuple[np.ndarray, float]:
        if self._kernel is None or self._kernel[0] != spec:
            self._kernel = None  # free the old matrix before building the new one
            k = kernel_matrix(spec, self.problem.x_s)
            self._kernel = (spec, k, float(np.mean(np.diag(k))))
        return self._kernel[1], self._kernel[2]

    def score(self, spec: KernelSpec, ridge: float) -> float:
        """The criterion at one point (+inf where the system is refused)."""
        own = self.points.setdefault(spec, {})
        if ridge in own:
            return own[ridge][0]
        k, _ = self.kernel(spec)
        p = self.problem
        if p.folds is None:
            res, runs = loo_point(k, p.y_c, ridge), 1
        else:
            res, runs = kfold_point(k, p.y_c, p.folds, ridge)
        p.factorizations += runs
        self.step(runs)
        t = p.y_c.shape[1]
        if res is None:
            got = (math.inf, np.full(t, np.nan))
        else:
            score, rmse = score_residuals(res[None], p.inv_var)
            got = (float(score[0]), rmse[0])
        own[ridge] = got
        return got[0]

    def ridge_limits(self, spec: KernelSpec) -> tuple[float, float]:
        """The ridge grid's range for this kernel (relative to the mean diagonal of K)."""
        _, diag = self.kernel(spec)
        scale = diag if diag > 0 and math.isfinite(diag) else 1.0
        return math.log(scale * RIDGE_RELATIVE[0]), math.log(scale * RIDGE_RELATIVE[1])

    def best(self, spec: KernelSpec) -> tuple[float, float]:
        """(ridge, score) of the best point scored for ``spec``."""
        own = self.points[spec]
        ridge = min(own, key=lambda r: own[r][0])
        return ridge, own[ridge][0]

    def best_point(self) -> tuple[KernelSpec, float, float]:
        """(spec, ridge, score) of the best point scored so far."""
        spec = min(self.points, key=lambda s: self.best(s)[1])
        return (spec, *self.best(spec))

    def curves(self) -> list[Curve]:
        """Every point scored, one curve (ridges ascending) per kernel setting."""
        out = []
        for spec, own in self.points.items():
            ridges = np.array(sorted(own))
            out.append(Curve(spec, ridges, np.array([own[r][0] for r in ridges]),
                             np.array([own[r][1] for r in ridges])))
        return out


def line_search(f: Callable[[float], float], lo: float, hi: float, tol: float,
                limits: tuple[float, float] = (-math.inf, math.inf)) -> float:
    """Bounded Brent search of ``f`` on [lo, hi] (a log scale), moving the bracket past an
    end where the best point lies there; returns the best argument scored."""
    seen: dict[float, float] = {}

    def g(u: float) -> float:
        if u not in seen:
            seen[u] = f(u)
        return seen[u] if math.isfinite(seen[u]) else 1e300

    for _ in range(EDGE_MOVES + 1):
        lo, hi = max(lo, limits[0]), min(hi, limits[1])
        lo = min(lo, hi - tol)  # a start outside the limits still gets a bracket inside
        minimize_scalar(g, bounds=(lo, hi), method="bounded",
                        options={"xatol": tol, "maxiter": STEPS_PER_SEARCH})
        best = min(seen, key=seen.get)
        width = hi - lo
        if best - lo < 2 * tol and lo > limits[0]:
            lo, hi = lo - width / 2, lo + 2 * tol
        elif hi - best < 2 * tol and hi < limits[1]:
            lo, hi = hi - 2 * tol, hi + width / 2
        else:
            break
    return min(seen, key=seen.get)


def settle_ridge(full: FullSize, spec: KernelSpec, ridge: float,
                 bracket: tuple[float, float] = RIDGE_BRACKET, tol: float = RIDGE_TOL) -> float:
    """Best ridge for ``spec`` near ``ridge`` (a fixed ridge is scored once and kept)."""
    if full.problem.ridge_fixed is not None:
        full.score(spec, full.problem.ridge_fixed)
        return full.problem.ridge_fixed
    u0 = math.log(ridge)
    best = line_search(lambda u: full.score(spec, math.exp(u)), u0 + bracket[0],
                       u0 + bracket[1], tol, full.ridge_limits(spec))
    return math.exp(best)


def settle_width(full: FullSize, spec: KernelSpec, ridge: float) -> KernelSpec:
    """Best width near ``spec.gamma`` at a fixed ridge."""
    u0 = math.log(spec.gamma)
    best = line_search(lambda u: full.score(replace(spec, gamma=math.exp(u)), ridge),
                       u0 + WIDTH_BRACKET[0], u0 + WIDTH_BRACKET[1], WIDTH_TOL)
    moved = replace(spec, gamma=math.exp(best))
    return moved if full.score(moved, ridge) < full.score(spec, ridge) else spec


def refine(full: FullSize, spec: KernelSpec, ridge: float) -> None:
    """Steps 2 and 3 of the module notes for a finalist already settled in ridge (the
    caller takes the best point scored: :meth:`FullSize.best_point`)."""
    wide = settle_width(full, spec, ridge)
    if wide != spec:
        settle_ridge(full, wide, ridge, POLISH_BRACKET, POLISH_TOL)
