"""Closed-form cross-validation residuals of kernel ridge regression.

For one kernel parameter setting, the kernel matrix of the standardized training rows is
decomposed once, K = Q Λ Qᵀ (``scipy.linalg.eigh``, divide and conquer). For every ridge λ
the kernel ridge smoother is H(λ) = Q Λ(Λ + λI)⁻¹ Qᵀ, and the exact leave-one-out residual
of row i (standardization and intercept held fixed) is the PRESS identity

    r_i(λ) = (y_i − ŷ_i) / (1 − H_ii)

(Allen 1974; Golub, Heath & Wahba, "Generalized cross-validation as a method for choosing a
good ridge parameter", Technometrics 1979; citations from memory). With g_k = λ / (λ_k + λ)
both parts are written without cancellation, since y − ŷ = Q diag(g) Qᵀ y and
1 − H_ii = Σ_k Q_ik² g_k (the rows of Q have unit norm). One O(n³) decomposition thus buys
the whole ridge path at O(n²) per λ, done as two matrix products over all ridge values at
once. k-fold validation residuals follow the same way from one decomposition per fold
(:func:`kfold_residuals`).
"""

from __future__ import annotations

import numpy as np
import scipy.linalg as sla

from trainer.exact.fit import safe_lapack

#: 1 − H_ii below this (relative) counts as a row the smoother interpolates: LOO undefined.
LEVERAGE_FLOOR = 1e-10
#: A ridge whose system K + λI would have a reciprocal condition below this is not offered,
#: so the final Cholesky fit never meets a system the tuner thought fine.
RCOND_FLOOR = 1e-11


def eigen_kernel(k: np.ndarray, psd: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """Symmetric eigendecomposition K = Q diag(w) Qᵀ, overwriting ``k``.

    Parameters
    ----------
    k : (n, n) symmetric kernel matrix; destroyed.
    psd : the kernel is positive semi-definite, so negative eigenvalues are round-off and are
        set to 0 (they would otherwise make λ_k/(λ_k + λ) exceed 1 for tiny λ).

    Returns
    -------
    (w, Q) : eigenvalues ascending, orthonormal eigenvectors in the columns of Q.
    """
    n = k.shape[0]
    if not np.isfinite(k).all():
        raise FloatingPointError("kernel matrix has non-finite entries")
    with safe_lapack(n):  # large factorizations must stay on one BLAS thread (trainer.exact.fit)
        w, q = sla.eigh(k, driver="evd", overwrite_a=True, check_finite=False)
    if psd:
        np.maximum(w, 0.0, out=w)
    return w, q


def loo_residuals(
    w: np.ndarray, q: np.ndarray, y_c: np.ndarray, ridges: np.ndarray
) -> np.ndarray:
    """Exact leave-one-out residuals of kernel ridge regression for many ridge values.

    Parameters
    ----------
    w, q : eigenvalues and eigenvectors of K (:func:`eigen_kernel`).
    y_c : (n, t) centered targets.
    ridges : (R,) ridge values λ > 0.

    Returns
    -------
    (R, n, t) residuals r_i = (y_i − ŷ_i)/(1 − H_ii), computed as
    [Q diag(g) Qᵀ y]_i / [Σ_k Q_ik² g_k] with g_k = λ/(w_k + λ); NaN where 1 − H_ii is below
    :data:`LEVERAGE_FLOOR` (the smoother interpolates that row: LOO is undefined).

    References
    ----------
    Allen (1974), Technometrics 16(1); Golub, Heath & Wahba (1979), Technometrics 21(2).
    """
    ridges = np.asarray(ridges, dtype=np.float64)
    n, t = y_c.shape
    g = ridges[None, :] / (w[:, None] + ridges[None, :])  # (n, R)
    qy = q.T @ y_c  # (n, t)
    numer = q @ (g[:, :, None] * qy[:, None, :]).reshape(n, -1)  # (n, R·t)
    denom = (q * q) @ g  # (n, R): 1 − H_ii, no cancellation
    numer = numer.reshape(n, ridges.size, t)
    with np.errstate(divide="ignore", invalid="ignore"):
        r = numer / denom[:, :, None]
    r[denom < LEVERAGE_FLOOR] = np.nan
    return np.moveaxis(r, 1, 0)


def feasible_ridges(w_raw: np.ndarray, ridges: np.ndarray) -> np.ndarray:
    """Mask of ridges for which K + λI is safely positive definite (condition guard)."""
    lo, hi = float(w_raw.min()), float(w_raw.max())
    return (ridges + lo) > RCOND_FLOOR * (ridges + max(hi, 0.0))


def fold_residuals(k_tt: np.ndarray, k_vt: np.ndarray, y_t: np.ndarray, y_v: np.ndarray,
                   ridges: np.ndarray, psd: bool) -> tuple[np.ndarray, np.ndarray]:
    """Validation residuals of one fold for all ridges, from one decomposition.

    For training part T and validation part V: ŷ_V(λ) = K_VT Q diag(1/(w + λ)) Qᵀ y_T with
    K_TT = Q diag(w) Qᵀ (``k_tt`` is destroyed). Returns (R, |V|, t) residuals y_V − ŷ_V and
    the feasible-ridge mask.
    """
    n_t, t = y_t.shape
    w, q = eigen_kernel(k_tt, psd=False)
    ok = feasible_ridges(w, ridges)
    if psd:
        np.maximum(w, 0.0, out=w)
    a = k_vt @ q  # (v, m)
    qy = q.T @ y_t  # (m, t)
    inv = 1.0 / (w[:, None] + ridges[None, :])  # (m, R)
    pred = a @ (inv[:, :, None] * qy[:, None, :]).reshape(n_t, -1)
    return y_v[None] - np.moveaxis(pred.reshape(len(y_v), ridges.size, t), 1, 0), ok


def kfold_residuals(k: np.ndarray, y_c: np.ndarray, folds: list[tuple[np.ndarray, np.ndarray]],
                    ridges: np.ndarray, psd: bool) -> tuple[np.ndarray, np.ndarray]:
    """Validation residuals of every fold for all ridges (:func:`fold_residuals` on slices
    of one kernel matrix). Returns (R, Σ|V|, t) residuals in fold order and the mask."""
    return stack_folds([fold_residuals(np.ascontiguousarray(k[np.ix_(tr, tr)]),
                                       k[np.ix_(val, tr)], y_c[tr], y_c[val], ridges, psd)
                        for tr, val in folds])


def stack_folds(parts: list[tuple[np.ndarray, np.ndarray]]) -> tuple[np.ndarray, np.ndarray]:
    """Folds' (residuals, mask) pairs → residuals in fold order, ridges feasible in all."""
    return (np.concatenate([r for r, _ in parts], axis=1),
            np.logical_and.reduce([ok for _, ok in parts]))
