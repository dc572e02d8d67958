"""One kernel setting and one ridge scored exactly through Cholesky factorizations.

Where a search needs the error at a few ridge values only, a full eigendecomposition (which
buys the whole ridge path) is wasted: a Cholesky factorization of K + λI takes n³/3
multiply-adds and the triangular inverse as many, where a symmetric eigendecomposition
with vectors takes several n³ (Golub & Van Loan, *Matrix Computations*, 4th ed., §4.2 and
§8.3; the measured ratio: DEVELOPERS.md, "Measured limits"). With A = K + λI = L Lᵀ:

* leave-one-out: α = A⁻¹ y and, since A⁻¹ = L⁻ᵀ L⁻¹, diag(A⁻¹)_i = Σ_j (L⁻¹)_ji², the squared
  norms of the columns of the triangular inverse. The exact LOO residual (standardization and
  intercept held fixed) is then r_i = α_i / (A⁻¹)_ii (Allen 1974; Golub, Heath & Wahba 1979,
  the same closed form :mod:`trainer.exact.loo` evaluates from the spectrum), and
  1 − H_ii = λ (A⁻¹)_ii;
* k-fold: one factorization per fold, ŷ_V = K_VT (K_TT + λI)⁻¹ y_T.

A system whose estimated reciprocal condition number (LAPACK ``dpocon``) is below
:data:`trainer.exact.loo.RCOND_FLOOR` scores +inf, as an infeasible ridge does on the path,
so the final fit never meets a system the tuner thought fine. Every factorization runs
under the OpenBLAS guard (:func:`trainer.exact.fit.safe_lapack`).
"""

from __future__ import annotations

import numpy as np
import scipy.linalg as sla
from scipy.linalg import lapack

from trainer.exact.fit import safe_lapack
from trainer.exact.loo import LEVERAGE_FLOOR, RCOND_FLOOR


def factor(k: np.ndarray, ridge: float, own: bool = False) -> np.ndarray | None:
    """Lower Cholesky factor (Fortran order) of K + λI, or None when it is not safely
    positive definite. ``k`` is left untouched unless ``own`` (a C-ordered copy the caller
    gives up: its transpose is the same symmetric matrix in Fortran order, used in place)."""
    n = k.shape[0]
    a = k.T if own and k.flags.c_contiguous else np.array(k, order="F", copy=True)
    a.flat[:: n + 1] += ridge
    anorm = float(np.abs(a).sum(axis=0).max())
    with safe_lapack(n):
        try:
            c, _ = sla.cho_factor(a, lower=True, overwrite_a=True, check_finite=False)
        except np.linalg.LinAlgError:
            return None
        rcond, info = lapack.dpocon(c, anorm, uplo="L")
    if info != 0 or not rcond >= RCOND_FLOOR:
        return None
    return c  # L in the lower triangle; the upper one holds what A held there


def _zero_upper(a: np.ndarray, block: int = 512) -> None:
    """Zero the strict upper triangle in place, by column blocks (no n × n temporary)."""
    n = a.shape[0]
    for j0 in range(0, n, block):
        j1 = min(j0 + block, n)
        a[:j0, j0:j1] = 0.0
        diag = a[j0:j1, j0:j1]
        diag[np.triu_indices(j1 - j0, 1)] = 0.0


def loo_point(k: np.ndarray, y_c: np.ndarray, ridge: float) -> np.ndarray | None:
    """Exact leave-one-out residuals (n, t) at one ridge from one factorization.

    Parameters
    ----------
    k : (n, n) kernel matrix of the standardized rows (kept).
    y_c : (n, t) centered targets.
    ridge : λ > 0.

    Returns
    -------
    r_i = α_i / (A⁻¹)_ii with A = K + λI, NaN where 1 − H_ii = λ (A⁻¹)_ii is below
    :data:`~trainer.exact.loo.LEVERAGE_FLOOR`; None when A is not safely positive definite.
    """
    c = factor(k, ridge)
    if c is None:
        return None
    with safe_lapack(k.shape[0]):
        alpha = sla.cho_solve((c, True), y_c, check_finite=False)
        inv_l, info = lapack.dtrtri(c, lower=1, overwrite_c=1)
    if info != 0:
        return None
    _zero_upper(inv_l)
    diag = np.einsum("ji,ji->i", inv_l, inv_l)
    with np.errstate(divide="ignore", invalid="ignore"):
        r = alpha / diag[:, None]
    r[ridge * diag < LEVERAGE_FLOOR] = np.nan
    return r


def kfold_point(k: np.ndarray, y_c: np.ndarray, folds: list[tuple[np.ndarray, np.ndarray]],
                ridge: float) -> tuple[np.ndarray | None, int]:
    """Validation residuals of every fold at one ridge, in fold order (Σ|V|, t), and the
    number of factorizations run (one per fold, fewer when a fold's system is not safely
    positive definite: the residuals are then None)."""
    parts = []
    for i, (tr, val) in enumerate(folds):
        c = factor(k[np.ix_(tr, tr)], ridge, own=True)
        if c is None:
            return None, i + 1
        with safe_lapack(tr.size):
            alpha = sla.cho_solve((c, True), y_c[tr], check_finite=False)
        parts.append(y_c[val] - k[np.ix_(val, tr)] @ alpha)
    return np.concatenate(parts, axis=0), len(folds)
