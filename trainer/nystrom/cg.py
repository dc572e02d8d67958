"""Nyström kernel ridge regression by preconditioned conjugate gradient: the numerics.

The direct solve (:mod:`trainer.nystrom.numerics`) forms G = K_nmᵀK_nm, n·m² multiply-adds.
Here the same system, in kridge's scaling of the ridge (λ multiplies K_mm as it is, not n·K_mm),

    H β = b,      H = K_nmᵀK_nm + λ K_mm,      b = K_nmᵀ(y − ȳ),

is solved by conjugate gradient, which needs only products H·v: each is one pass over the
rows, K_nmᵀ(K_nm v), with the kernel values formed tile by tile and never stored, n·m values a
pass. The preconditioner is FALKON's (Rudi, Carratino & Rosasco, "FALKON: An Optimal Large
Scale Kernel Method", NeurIPS 2017, Sec. 3; the factor order of Meanti, Carratino, Rosasco &
Rudi, "Kernel methods through the roof", NeurIPS 2020): with uniform landmarks
K_nmᵀK_nm ≈ (n/m) K_mm², so H ≈ (n/m) K_mm² + λ K_mm = Tᵀ((n/m) T Tᵀ + λ I) T for the
Cholesky factor K_mm = TᵀT, and with (n/m) T Tᵀ + λ I = AᵀA,

    B = T⁻¹ A⁻¹,      Bᵀ H B w = Bᵀ b,      β = B w,

whose matrix is close to the identity: CG converges in tens of iterations whatever λ is.

Stopping rule: per column of the right-hand side, the relative residual of the
preconditioned system ‖Bᵀ(b − Hβ_k)‖ / ‖Bᵀb‖ falls to ``tol``, or ``max_iter`` iterations ran
(the record says which). Several right-hand sides (targets, and several ridge values, each
with its own A) run side by side: one pass over the rows serves them all.

Reuse across ridges: T and T Tᵀ depend only on the kernel and are shared; A does not allow it,
as the Cholesky factor of a shifted matrix is no cheap update of the unshifted one, so each
ridge costs one m³/3 factorization. (An eigendecomposition of T Tᵀ would make every further
ridge a diagonal rescale, but costs about 27 Choleskys: worth it only for more ridges.)

A rank-deficient K_mm (a very wide kernel, repeated landmarks) gets a jitter on its diagonal
for the factor T only (FALKON adds one of order m·eps); H itself keeps the exact K_mm, so the
preconditioner changes the iterations, never the solution.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import scipy.linalg as sla

from service.kernels import KernelBlocks, KernelSpec, finish_tile, kernel_matrix

#: Kernel values per tile (2 MB of float64): a tile stays in a core's L2 cache between its
#: three passes (product, kernel function, the two products with v), which memory-sized
#: blocks do not.
TILE_VALUES = 1 << 18
#: Default stopping rule: relative residual in the preconditioned norm, and an iteration cap.
CG_TOL, CG_MAX_ITER = 1e-6, 100
#: First jitter on K_mm's diagonal (times m·max diag), grown ×100 until the factor exists.
JITTER_START, JITTER_MAX = 1e-10, 1e-4


def tile_rows(m: int) -> int:
    """Rows per tile for m landmarks (at least 8)."""
    return max(8, TILE_VALUES // max(m, 1))


def _tiles(kern: KernelBlocks, x: np.ndarray):
    """The kernel tiles k(x_i, L) of the rows x, one buffer reused, no clip of u (a value a
    hair above k(x, x) from rounding does not matter in a sum)."""
    rows = tile_rows(kern.n)
    buf = np.empty((min(rows, x.shape[0]), kern.n))
    scratch = None if kern.spec.name in ("rbf", "linear", "laplacian", "sigmoid") \
        else np.empty_like(buf)
    for i in range(0, x.shape[0], rows):
        q = x[i:i + rows]
        u = kern.exponent(kern.rows(q), buf[:q.shape[0]])
        yield i, finish_tile(kern.spec, u, None if scratch is None else scratch[:q.shape[0]])


def gram_times(kern: KernelBlocks, x: np.ndarray, v: np.ndarray) -> np.ndarray:
    """K_xmᵀ(K_xm v) for the rows x and an (m, c) matrix v, tile by tile."""
    out = np.zeros((kern.n, v.shape[1]))
    for _i, k in _tiles(kern, x):
        out += k.T @ (k @ v)
    return out


def cross_sums(kern: KernelBlocks, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """K_xmᵀ[1, y], (m, 1 + t): the kernel's column sums and its products with the targets."""
    ones_y = np.empty((x.shape[0], 1 + y.shape[1]))
    ones_y[:, 0] = 1.0
    ones_y[:, 1:] = y
    out = np.zeros((kern.n, ones_y.shape[1]))
    for i, k in _tiles(kern, x):
        out += k.T @ ones_y[i:i + k.shape[0]]
    return out


#: Rows per chunk of a pass over the training rows: one work item of a thread or a share of
#: a Dask block, enough tiles to hide the hand-over.
CHUNK_ROWS = 8192


def chunks(start: int, stop: int) -> list[slice]:
    """Slices of at most :data:`CHUNK_ROWS` rows covering [start, stop)."""
    return [slice(i, min(i + CHUNK_ROWS, stop)) for i in range(start, stop, CHUNK_ROWS)]


def _ordered_sum(parts) -> np.ndarray:
    total = None
    for part in parts:
        total = part if total is None else total + part
    return total


def block_total(fn, kern: KernelBlocks, x: np.ndarray, y: np.ndarray, *args) -> np.ndarray:
    """Σ over the block's chunks of fn(kern, x_chunk, y_chunk, *args), in chunk order (None
    for a block without rows)."""
    return _ordered_sum(fn(kern, x[s], y[s], *args) for s in chunks(0, x.shape[0]))


#: How a solver sums a per-block function over every training block, in block order:
#: ``row_sum(fn, *args)`` = Σ_blocks fn(kern, x_block, y_block, *args).
RowSum = Callable[..., np.ndarray]


def gram_block(kern: KernelBlocks, x: np.ndarray, _y: np.ndarray, v: np.ndarray) -> np.ndarray:
    return gram_times(kern, x, v)


def cross_block(kern: KernelBlocks, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    return cross_sums(kern, x, y)


def landmark_factor(kmm: np.ndarray) -> tuple[np.ndarray, float]:
    """(T upper, jitter): K_mm + jitter·I = TᵀT by Cholesky, jitter the smallest of
    m·max diag·{1e-10, 1e-8, …} that lets the factor exist (one of order m·eps,
    as FALKON adds, left CG stalling on a singular K_mm: tests/test_nystrom_cg.py)."""
    m = kmm.shape[0]
    base = m * max(float(np.max(np.diag(kmm))), 1e-300)
    rel = JITTER_START
    while True:
        a = kmm.copy(order="F")
        a[np.diag_indices(m)] += rel * base
        t, info = sla.lapack.dpotrf(a, lower=0, overwrite_a=1, clean=1)
        if info == 0:
            return t, rel * base
        if rel >= JITTER_MAX:
            raise np.linalg.LinAlgError("K_mm has no Cholesky factor even with jitter "
                                        f"{rel * base:.3g}")
        rel *= 100.0


@dataclass
class Preconditioner:
    """FALKON's B = T⁻¹A_λ⁻¹ for one or more ridge values (module notes).

    Column j of a right-hand side with t targets belongs to ridge ``j // t``.
    """

    t: np.ndarray  # (m, m) upper, K_mm + jitter·I = TᵀT
    a: list[np.ndarray]  # (m, m) upper, (n/m) T Tᵀ + λ_i I = A_iᵀA_i
    targets: int
    jitter: float

    @classmethod
    def build(cls, kmm: np.ndarray, n: int, ridges: list[float], targets: int
              ) -> Preconditioner:
        """T once, T Tᵀ once (LAPACK dlauum, m³/3), one Cholesky per ridge."""
        m = kmm.shape[0]
        t, jitter = landmark_factor(kmm)
        ttt, info = sla.lapack.dlauum(t, lower=0)  # T Tᵀ, upper triangle
        if info:
            raise np.linalg.LinAlgError(f"dlauum failed ({info})")
        ttt *= n / m
        factors = []
        for lam in ridges:
            a = ttt.copy(order="F")
            a[np.diag_indices(m)] += lam
            f, info = sla.lapack.dpotrf(a, lower=0, overwrite_a=1, clean=1)
            if info:
                raise np.linalg.LinAlgError(f"(n/m)TTᵀ + {lam:g}·I has no Cholesky factor")
            factors.append(f)
        return cls(t, factors, targets, jitter)

    def _groups(self, c: int):
        for i, a in enumerate(self.a):
            cols = slice(i * self.targets, min((i + 1) * self.targets, c))
            yield a, cols

    def apply(self, v: np.ndarray) -> np.ndarray:
        """B v = T⁻¹(A⁻¹ v), column groups by ridge."""
        out = np.empty_like(v)
        for a, cols in self._groups(v.shape[1]):
            out[:, cols] = sla.solve_triangular(a, v[:, cols], lower=False,
                                                check_finite=False)
        return sla.solve_triangular(self.t, out, lower=False, check_finite=False)

    def apply_t(self, v: np.ndarray) -> np.ndarray:
        """Bᵀ v = A⁻ᵀ(T⁻ᵀ v)."""
        w = sla.solve_triangular(self.t, v, trans="T", lower=False, check_finite=False)
        for a, cols in self._groups(v.shape[1]):
            w[:, cols] = sla.solve_triangular(a, w[:, cols], trans="T", lower=False,
                                              check_finite=False)
        return w


class NoPreconditioner:
    """B = I: plain CG on H β = b (for comparison only)."""

    jitter = 0.0

    def apply(self, v: np.ndarray) -> np.ndarray:
        return v

    apply_t = apply


@dataclass
class CgRun:
    """What a CG solve did, for the manifest."""

    beta: np.ndarray  # (m, c)
    iterations: int
    residuals: np.ndarray  # (c,) final relative residuals, preconditioned norm
    converged: bool
    seconds: float
    history: list[float] = field(default_factory=list)  # worst column's residual per step

    def record(self, tol: float, max_iter: int) -> dict:
        return {"iterations": self.iterations, "max_iterations": max_iter, "tolerance": tol,
                "final_residual": float(self.residuals.max()),
                "converged": bool(self.converged), "seconds": round(self.seconds, 3),
                "stopping_rule": "relative residual ‖Bᵀ(b − Hβ)‖ / ‖Bᵀb‖ of the "
                                 "preconditioned system ≤ tolerance, per column, or the "
                                 "iteration cap"}


def conjugate_gradient(h_times: Callable[[np.ndarray], np.ndarray], b: np.ndarray,
                       precond, tol: float = CG_TOL, max_iter: int = CG_MAX_ITER) -> CgRun:
    """Solve H β = b column by column by CG on Bᵀ H B w = Bᵀ b, β = B w.

    Parameters
    ----------
    h_times : v ↦ H v for an (m, c) matrix (one pass over the rows serves every column).
    b : (m, c) right-hand sides.
    precond : :class:`Preconditioner` or :class:`NoPreconditioner`.

    Notes
    -----
    Hestenes & Stiefel's CG (J. Res. NBS 1952) on the preconditioned system, each column
    with its own step sizes; a column that met the stopping rule (module notes) keeps its
    iterate while the others go on.
    """
    t0 = time.perf_counter()
    w = np.zeros_like(b)
    r = precond.apply_t(b)
    p = r.copy()
    rs = np.einsum("ij,ij->j", r, r)
    rs0 = np.where(rs > 0, rs, 1.0)
    rel = np.sqrt(rs / rs0)
    history = [float(rel.max())]
    it = 0
    while it < max_iter and (rel > tol).any():
        active = rel > tol
        q = precond.apply_t(h_times(precond.apply(p)))
        pq = np.einsum("ij,ij->j", p, q)
        alpha = np.where(active & (pq > 0), rs / np.where(pq > 0, pq, 1.0), 0.0)
        w += p * alpha
        r -= q * alpha
        rs_new = np.einsum("ij,ij->j", r, r)
        beta = np.where(active, rs_new / np.where(rs > 0, rs, 1.0), 0.0)
        p = r + p * beta
        rs = np.where(active, rs_new, rs)
        rel = np.sqrt(rs / rs0)
        it += 1
        history.append(float(rel.max()))
    return CgRun(precond.apply(w), it, rel, bool((rel <= tol).all()),
                 time.perf_counter() - t0, history)


@dataclass
class CgFit:
    """β for every ridge asked for, the mean and the record of the solve."""

    betas: list[np.ndarray]  # one (m, t) per ridge
    intercept: np.ndarray
    run: CgRun
    jitter: float
    count: int


def solve_nystrom_cg(spec: KernelSpec, landmarks: np.ndarray, row_sum: RowSum,
                     mean: np.ndarray, count: int, ridges: list[float], tol: float = CG_TOL,
                     max_iter: int = CG_MAX_ITER, precondition: bool = True) -> CgFit:
    """(K_nmᵀK_nm + λ K_mm) β = K_nmᵀ(y − ȳ) for each λ in ``ridges`` by preconditioned CG.

    ``row_sum(fn, *args)`` sums ``fn(kern, x_block, y_block, *args)`` over the training
    blocks in block order (here in threads, or on Dask workers); ``mean`` is ȳ of their
    ``count`` rows.
    The same β as :func:`trainer.nystrom.numerics.ridge_path` to the tolerance, wherever
    K_mm has full rank (else the same predictions).
    """
    cross = row_sum(cross_block)
    t = cross.shape[1] - 1
    b = cross[:, 1:] - np.outer(cross[:, 0], mean)
    kmm = kernel_matrix(spec, landmarks)
    precond = (Preconditioner.build(kmm, count, ridges, t) if precondition
               else NoPreconditioner())
    lam = np.repeat(np.asarray(ridges, dtype=np.float64), t)
    rhs = np.tile(b, (1, len(ridges)))

    def h_times(v: np.ndarray) -> np.ndarray:
        return row_sum(gram_block, v) + (kmm @ v) * lam

    run = conjugate_gradient(h_times, rhs, precond, tol, max_iter)
    betas = [run.beta[:, i * t:(i + 1) * t] for i in range(len(ridges))]
    return CgFit(betas, mean, run, precond.jitter, count)
