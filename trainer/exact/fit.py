"""Exact kernel ridge regression fit.

The model (README, "Concepts"): features standardized with the training mean and
population standard deviation; target centered on its training mean; dual coefficients

    α = (K + λI)⁻¹ (y − ȳ),

solved with a Cholesky factorization (Golub & Van Loan, *Matrix Computations*, 4th ed., §4.2).
The same α is what scikit-learn's ``KernelRidge`` computes (its ``alpha`` is our ridge λ).
"""

from __future__ import annotations

import contextlib
from dataclasses import dataclass

import numpy as np
import scipy.linalg as sla
from scipy.linalg import lapack
from threadpoolctl import threadpool_limits

from service.kernels import KernelSpec, kernel_matrix
from service.target_kernels import kernel_groups
from trainer.errors import UserError

#: Reciprocal condition number below which the system is called numerically singular.
RCOND_MIN = 1e-13
#: From this size on, LAPACK factorizations run on one BLAS thread: the OpenBLAS bundled with
#: the numpy/scipy wheels here crashes (SIGSEGV) in multi-threaded Cholesky at n ≥ 16,000 on
#: AVX-512 CPUs (measured here: README, "Large models on AVX-512 machines"); 12,000 leaves a
#: margin below the smallest size seen to crash (its cost in time: DEVELOPERS.md).
SINGLE_THREAD_FROM = 12_000


def safe_lapack(n: int):
    """Context for an n × n LAPACK factorization that must not crash the process."""
    if n >= SINGLE_THREAD_FROM:
        return threadpool_limits(1, user_api="blas")
    return contextlib.nullcontext()


@dataclass
class Standardizer:
    """s(x) = (x − mean) / scale with population statistics; constant features get scale 1."""

    mean: np.ndarray
    scale: np.ndarray

    @classmethod
    def fit(cls, x: np.ndarray) -> Standardizer:
        x = np.ascontiguousarray(x)  # same summation order whatever the caller's layout
        mean = x.mean(axis=0)
        scale = x.std(axis=0)  # ddof=0, as scikit-learn's StandardScaler
        scale[scale == 0] = 1.0
        return cls(mean, scale)

    def __call__(self, x: np.ndarray) -> np.ndarray:
        # C order, as the bundle stores it: column selections arrive Fortran-ordered, and
        # row norms summed over a Fortran-ordered array can differ in the last bit, which
        # made the in-memory fit and its published bundle disagree
        return np.ascontiguousarray((x - self.mean) / self.scale)


@dataclass
class Fit:
    """A fitted model in the form the bundle stores."""

    spec: KernelSpec
    ridge: float
    scaler: Standardizer
    intercept: np.ndarray  # (t,)
    x_s: np.ndarray  # (n, d) standardized training rows
    dual: np.ndarray  # (n, t)
    loo_residuals: np.ndarray | None = None  # (n, t), exact, when asked for
    #: each target's (kernel, ridge) when they are its own (``spec``, ``ridge``: the first's)
    per_target: list[tuple[KernelSpec, float]] | None = None

    def predict(self, x_raw: np.ndarray) -> np.ndarray:
        """(m, t) raw-unit predictions (small batches; serving uses the tiled engine)."""
        q = self.scaler(x_raw)
        if self.per_target is None:
            return kernel_matrix(self.spec, q, self.x_s) @ self.dual + self.intercept
        out = np.empty((q.shape[0], self.dual.shape[1]))
        for spec, cols in kernel_groups([s for s, _ in self.per_target]):
            out[:, cols] = kernel_matrix(spec, q, self.x_s) @ self.dual[:, cols]
        return out + self.intercept


def solve_dual(k: np.ndarray, y_c: np.ndarray, ridge: float, want_loo: bool = False):
    """Solve (K + λI) α = y_c by Cholesky, overwriting ``k``.

    Parameters
    ----------
    k : (n, n) kernel matrix; destroyed.
    y_c : (n, t) centered targets.
    ridge : λ > 0 (0 is allowed when K itself is positive definite).
    want_loo : also return the exact leave-one-out residuals r_i = α_i / [(K + λI)⁻¹]_ii
        (Allen, "The relationship between variable selection and data augmentation and a
        method for prediction", Technometrics 1974; the standard PRESS identity for linear
        smoothers), with the standardization and intercept held fixed.

    Returns
    -------
    (α, loo residuals or None)

    Raises
    ------
    UserError when K + λI is not numerically positive definite.
    """
    n = k.shape[0]
    k.flat[:: n + 1] += ridge
    # 1-norm for the condition estimate, by row blocks: np.abs(k) whole would be one more
    # n × n temporary (the matrix is symmetric, so row sums are column sums)
    anorm = max(
        float(np.abs(k[i : i + 1024]).sum(axis=1).max()) for i in range(0, n, 1024)
    )
    hint = f"the kernel system (n = {n}, ridge = {ridge:g}) is numerically singular; " \
        "raise --ridge (e.g. by a factor of 10) or remove duplicated/near-duplicate rows"
    # LAPACK works in place only on Fortran-ordered arrays; a C-ordered k would be copied
    # whole (and again by dpocon/dpotri), tripling the memory of a large fit. K is
    # symmetric, so its transpose is the same matrix in Fortran order, at no cost.
    a = k.T if k.flags.c_contiguous else k
    with safe_lapack(n):
        try:
            c, lower = sla.cho_factor(a, lower=True, overwrite_a=True, check_finite=False)
        except np.linalg.LinAlgError:
            raise UserError(hint) from None
        # c is Fortran-ordered with L in its lower triangle
        rcond, info = lapack.dpocon(c, anorm, uplo="L")
        if info != 0 or rcond < RCOND_MIN:
            raise UserError(f"{hint} (reciprocal condition number {rcond:.1e})")
        dual = sla.cho_solve((c, lower), y_c, check_finite=False)
        loo = None
        if want_loo:
            inv, info = lapack.dpotri(c, lower=1, overwrite_c=True)
            if info != 0:
                raise UserError(hint)
            loo = dual / np.diag(inv)[:, None]
    return dual, loo


def fit_exact(
    x: np.ndarray, y: np.ndarray, spec: KernelSpec, ridge: float, want_loo: bool = False
) -> Fit:
    """Standardize, center and solve the kernel ridge system exactly. ``y`` is (n, t)."""
    if not ridge >= 0:
        raise UserError(f"ridge must be a non-negative number, got {ridge}")
    scaler = Standardizer.fit(x)
    x_s = scaler(x)
    intercept = np.ascontiguousarray(y).mean(axis=0)
    k = kernel_matrix(spec, x_s)
    dual, loo = solve_dual(k, y - intercept, ridge, want_loo)
    return Fit(spec, ridge, scaler, intercept, x_s, dual, loo)




def fit_exact_each(x: np.ndarray, y: np.ndarray, pairs: list[tuple[KernelSpec, float]],
                   want_loo: bool = False) -> Fit:
    """:func:`fit_exact` with each target's own kernel and ridge (``pairs``, target order).

    Every target's α_j = (K_j + λ_j I)⁻¹ (y_j − ȳ_j) is the single-target solution; targets
    with the same kernel share one kernel matrix, and those with the same kernel and ridge
    one Cholesky factorization. The matrix is rebuilt for a second ridge rather than copied,
    so memory stays at one n × n matrix.
    """
    for _, ridge in pairs:
        if not ridge >= 0:
            raise UserError(f"ridge must be a non-negative number, got {ridge}")
    scaler = Standardizer.fit(x)
    x_s = scaler(x)
    intercept = np.ascontiguousarray(y).mean(axis=0)
    y_c = y - intercept
    dual = np.empty_like(y_c)
    loo = np.empty_like(y_c) if want_loo else None
    for spec, cols in kernel_groups([s for s, _ in pairs]):
        by_ridge: dict[float, list[int]] = {}
        for j in cols:
            by_ridge.setdefault(pairs[j][1], []).append(j)
        for ridge, js in by_ridge.items():
            d, r = solve_dual(kernel_matrix(spec, x_s), y_c[:, js], ridge, want_loo)
            dual[:, js] = d
            if loo is not None:
                loo[:, js] = r
    return Fit(pairs[0][0], pairs[0][1], scaler, intercept, x_s, dual, loo,
               per_target=list(pairs))
