"""One tuning candidate: a kernel parameter setting scored along a ridge grid.

:func:`evaluate` computes the cross-validated error of one setting for every ridge value at
once (exact leave-one-out or k-fold, as the :class:`~trainer.validation.folds.Problem` says) and
returns it as a :class:`Curve`. The criterion is the mean over targets of MSE / Var(target),
so targets in different units weigh the same.
"""

from __future__ import annotations

import logging
import time
from dataclasses import dataclass

import numpy as np

from service.kernels import KernelSpec, kernel_block, kernel_matrix
from trainer.exact.loo import (
    eigen_kernel,
    feasible_ridges,
    fold_residuals,
    kfold_residuals,
    loo_residuals,
    stack_folds,
)
from trainer.validation.folds import Problem


@dataclass
class Curve:
    """Error of one kernel parameter setting along the ridge grid."""

    spec: KernelSpec
    ridges: np.ndarray  # (R,)
    score: np.ndarray  # (R,) mean over targets of MSE / Var(y_t); inf where not allowed
    rmse: np.ndarray  # (R, t)
    failure: str | None = None  # why the candidate could not be evaluated at all

    @property
    def best(self) -> int:
        return int(np.argmin(self.score))

    @property
    def best_score(self) -> float:
        return float(self.score[self.best])

    def as_json(self) -> dict:
        ok = np.isfinite(self.score)
        return {
            "kernel": self.spec.name,
            "params": self.spec.params(),
            "ridge": [float(v) for v in self.ridges],
            "rmse": [[float(v) for v in row] if good else None
                         for row, good in zip(self.rmse, ok, strict=True)],
            "score": [float(v) if good else None for v, good in zip(self.score, ok, strict=True)],
        }


def score_residuals(res: np.ndarray, inv_var: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(R, m, t) residuals → criterion (R,) and RMSE (R, t); inf/NaN rows become inf."""
    mse = np.mean(res**2, axis=1)  # (R, t); NaN propagates
    score = (mse * inv_var[None, :]).mean(axis=1)
    score[~np.isfinite(score)] = np.inf
    return score, np.sqrt(mse)


def _own_fold_residuals(problem: Problem, spec: KernelSpec, ridges: np.ndarray,
                        psd: bool) -> tuple[np.ndarray, np.ndarray]:
    """Residuals of folds that each standardize and centre on their own training rows."""
    parts = []
    for i in range(len(problem.folds)):
        x_t, x_v, y_t, y_v = problem.fold_rows(i)
        parts.append(fold_residuals(kernel_matrix(spec, x_t), kernel_block(spec, x_v, x_t),
                                    y_t, y_v, ridges, psd))
    return stack_folds(parts)


def evaluate(problem: Problem, spec: KernelSpec, ridges: np.ndarray | None = None) -> Curve:
    """Cross-validated error of one kernel setting along a ridge grid (LOO or k-fold)."""
    t0 = time.perf_counter()
    psd = spec.name != "sigmoid"
    x = problem.x_s
    try:
        k = kernel_matrix(spec, x)
        diag_mean = float(np.mean(np.diag(k)))
        if ridges is None:
            ridges = problem.ridge_grid(diag_mean)
        if problem.folds is None:
            w, q = eigen_kernel(k, psd=False)
            ok = feasible_ridges(w, ridges)
            if psd:
                np.maximum(w, 0.0, out=w)
            res = loo_residuals(w, q, problem.y_c, ridges)
        elif problem.raw is not None:
            res, ok = _own_fold_residuals(problem, spec, ridges, psd)
        else:
            res, ok = kfold_residuals(k, problem.y_c, problem.folds, ridges, psd)
    except (FloatingPointError, np.linalg.LinAlgError) as exc:
        # the numerical failures a candidate may meet (non-finite kernel matrix, eigh not
        # converging): that candidate is unusable; anything else is a bug and propagates
        logging.getLogger("kridge.tuning").warning(
            "tuning: %s left out (%s: %s)", spec.describe(), type(exc).__name__, exc)
        ridges = np.asarray(ridges if ridges is not None else [np.nan])
        t = problem.y_c.shape[1]
        return Curve(spec, ridges, np.full(ridges.size, np.inf),
                     np.full((ridges.size, t), np.nan), failure=f"{type(exc).__name__}: {exc}")
    score, rmse = score_residuals(res, problem.inv_var)
    score[~ok] = np.inf
    problem.evaluated += problem.decompositions
    problem.seconds += time.perf_counter() - t0
    return Curve(spec, np.asarray(ridges, dtype=np.float64), score, rmse)
