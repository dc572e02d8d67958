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

Stopping rules: per column of the right-hand side, the relative residual of the
preconditioned system ‖Bᵀ(b − Hβ_k)‖ / ‖Bᵀb‖ falls to ``tol``, the validation rule of
:mod:`trainer.nystrom.cg_stop` stops it, or ``max_iter`` iterations ran (the record says
which, per column).

Precision: the kernel values may be float32 (:data:`TILE_DTYPE`, float64 by default); the
products with v stay float64. With kridge's tiny tuned ridges v = Bp has large components
along K_mm's near-null directions that cancel in K_nm v, so float32 rounding of the values
(or of the sums) moves the iterates (README, "The CG solver", for the figures).

Several right-hand sides (targets, and several ridge values, each with its own A) run side
by side: one pass over the rows serves them all.

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
from trainer.nystrom.cg_precond import NoPreconditioner, Preconditioner
from trainer.nystrom.cg_stop import ValidationStop, rule_text

#: Kernel values per tile (1 MB of float32): one tile stays in a core's L2 cache between its
#: passes (product, kernel function, the two products with v), which memory-sized blocks
#: do not.
TILE_VALUES = 1 << 18
#: Precision of the kernel values of an iteration's tiles: float64 (default), or float32
#: (Q̃X̃ and exp in single precision; the products K_t v and K_tᵀ(K_t v) stay float64). Kept
#: float64 because float32 values bought no time once widened for the products, and moved
#: the iterates (README, "The CG solver": measured with bench/cg_bench.py).
TILE_DTYPE = np.float64
#: Default stopping rule: relative residual in the preconditioned norm, and an iteration cap.
CG_TOL, CG_MAX_ITER = 1e-6, 100


def tiles_text(dtype) -> str:
    """The manifest's words for the kernel tiles' precision."""
    if np.dtype(dtype) == np.float64:
        return "float64 kernel tiles and products"
    return (f"{np.dtype(dtype).name} kernel values (Q̃X̃ and exp), products K_t v and "
            "K_tᵀ(K_t v) in float64")


def tile_rows(m: int) -> int:
    """Rows per tile for m landmarks (at least 8)."""
    return max(8, TILE_VALUES // max(m, 1))


def _tiles(kern: KernelBlocks, x: np.ndarray):
    """The kernel tiles k(x_i, L) of the rows x in the blocks' dtype, one buffer reused, no
    clip of u (a value a hair above k(x, x) from rounding does not matter in a sum)."""
    rows = tile_rows(kern.n)
    buf = np.empty((min(rows, x.shape[0]), kern.n), dtype=kern.dtype)
    scratch = None if kern.spec.name in ("rbf", "linear", "laplacian", "sigmoid") \
        else np.empty_like(buf)
    for i in range(0, x.shape[0], rows):
        q = x[i:i + rows]
        u = kern.exponent(kern.rows(q), buf[:q.shape[0]])
        yield i, finish_tile(kern.spec, u, None if scratch is None else scratch[:q.shape[0]])


def gram_times(kern: KernelBlocks, x: np.ndarray, v: np.ndarray) -> np.ndarray:
    """K_xmᵀ(K_xm v) for the rows x and an (m, c) matrix v, tile by tile, in float64.

    Each tile's K_tᵀ(K_t v) is one BLAS product accumulated in place (``dgemm`` with β = 1,
    Fortran order: no copy of the tile); float32 tiles are widened into one reused float64
    buffer first.
    """
    out = np.zeros((kern.n, v.shape[1]), order="F")
    wide = None
    for _i, tile in _tiles(kern, x):
        k = tile
        if tile.dtype != np.float64:
            if wide is None:
                wide = np.empty(tile.shape)
            k = wide[:tile.shape[0]]
            np.copyto(k, tile)
        # k is C-ordered (r, m): k.T is Fortran-ordered (m, r), which gemm reads as it is
        out = sla.blas.dgemm(1.0, k.T, k @ v, beta=1.0, c=out, overwrite_c=1)
    return out


def cross_sums(kern: KernelBlocks, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """K_xmᵀ[1, y], (m, 1 + t): the kernel's column sums and its products with the targets
    (float64 for the exact right-hand side, whatever the tiles' dtype)."""
    ones_y = np.empty((x.shape[0], 1 + y.shape[1]))
    ones_y[:, 0] = 1.0
    ones_y[:, 1:] = y
    out = np.zeros((kern.n, ones_y.shape[1]))
    for i, k in _tiles(kern, x):
        out += k.T.astype(np.float64, copy=False) @ ones_y[i:i + k.shape[0]]
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


@dataclass
class CgRun:
    """What a CG solve did, for the manifest."""

    beta: np.ndarray  # (m, c)
    iterations: int
    residuals: np.ndarray  # (c,) final relative residuals, preconditioned norm
    converged: bool
    seconds: float
    history: list[float] = field(default_factory=list)  # worst column's residual per step
    stopped_by: list[str] = field(default_factory=list)  # per column: residual|validation|cap
    column_iterations: list[int] = field(default_factory=list)
    monitor: ValidationStop | None = None

    def record(self, tol: float, max_iter: int) -> dict:
        return {"iterations": self.iterations, "max_iterations": max_iter, "tolerance": tol,
                "final_residual": float(self.residuals.max()),
                "converged": bool(self.converged), "seconds": round(self.seconds, 3),
                "stopping_rule": rule_text(self.monitor), "stopped_by": self.stopped_by,
                "column_iterations": self.column_iterations,
                "validation_check": None if self.monitor is None else self.monitor.record()}


#: Why a column stopped, by code (0: still running).
_STOP_WORDS = {1: "residual", 2: "validation", 3: "cap"}


def conjugate_gradient(h_times: Callable[[np.ndarray, np.ndarray], np.ndarray], b: np.ndarray,
                       precond, tol: float = CG_TOL, max_iter: int = CG_MAX_ITER,
                       monitor: ValidationStop | None = None) -> CgRun:
    """Solve H β = b column by column by CG on Bᵀ H B w = Bᵀ b, β = B w.

    Parameters
    ----------
    h_times : (v, cols) ↦ H v for an (m, k) matrix v holding the solve's columns ``cols``
        (one pass over the rows serves every column given).
    b : (m, c) right-hand sides.
    precond : :class:`Preconditioner` or :class:`NoPreconditioner`.
    monitor : the validation rule (:mod:`trainer.nystrom.cg_stop`), or None for the
        residual rule alone.

    Notes
    -----
    Hestenes & Stiefel's CG (J. Res. NBS 1952) on the preconditioned system, each column
    with its own step sizes; a column that met a stopping rule keeps its iterate (the
    validation rule: its best-scored one) while the others go on.
    """
    t0 = time.perf_counter()
    w = np.zeros_like(b)
    r = precond.apply_t(b)
    p = r.copy()
    rs = np.einsum("ij,ij->j", r, r)
    rs0 = np.where(rs > 0, rs, 1.0)
    rel = np.sqrt(rs / rs0)
    history = [float(rel.max())]
    stop = np.where(rel <= tol, 1, 0)
    at = np.zeros(b.shape[1], dtype=int)
    it = 0
    while it < max_iter and (stop == 0).any():
        active = stop == 0
        # only the running columns pass over the rows: a stopped one no longer costs
        # its share of the products with the tiles
        cols = np.flatnonzero(active)
        q = np.zeros_like(p)
        q[:, cols] = precond.apply_t(h_times(precond.apply(p[:, cols], cols), cols), cols)
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
        stop[active & (rel <= tol)] = 1
        if monitor is not None:
            stalled = monitor.update(it, precond.apply(w))
            stop[(stop == 0) & stalled] = 2
        at[active] = it
    stop[stop == 0] = 3
    beta_out = precond.apply(w)
    if monitor is not None:
        by_val = stop == 2
        beta_out[:, by_val] = monitor.best_beta[:, by_val]
    return CgRun(beta_out, it, rel, bool((rel <= tol).all()), time.perf_counter() - t0,
                 history, [_STOP_WORDS[int(c)] for c in stop], [int(i) for i in at], monitor)


@dataclass
class CgFit:
    """β for every ridge asked for, the mean and the record of the solve."""

    betas: list[np.ndarray]  # one (m, t) per ridge
    intercept: np.ndarray
    run: CgRun
    jitter: float
    count: int
    tiles: str = ""  # the kernel tiles' precision, in words


def solve_nystrom_cg(spec: KernelSpec, landmarks: np.ndarray, row_sum: RowSum,
                     mean: np.ndarray, count: int, ridges: list[float], tol: float = CG_TOL,
                     max_iter: int = CG_MAX_ITER, precondition: bool = True,
                     check: tuple[np.ndarray, np.ndarray] | None = None) -> CgFit:
    """(K_nmᵀK_nm + λ K_mm) β = K_nmᵀ(y − ȳ) for each λ in ``ridges`` by preconditioned CG.

    ``row_sum(fn, *args)`` sums ``fn(kern, x_block, y_block, *args)`` over the training
    blocks in block order (here in threads, or on Dask workers); ``mean`` is ȳ of their
    ``count`` rows. ``check``: validation rows (x, y) for the validation stopping rule
    (:mod:`trainer.nystrom.cg_stop`); without them the residual rule alone.
    Run to the residual rule with float64 tiles, the same β as
    :func:`trainer.nystrom.numerics.ridge_path` to the tolerance wherever K_mm has full
    rank (else the same predictions).
    """
    cross = row_sum(cross_block)
    t = cross.shape[1] - 1
    b = cross[:, 1:] - np.outer(cross[:, 0], mean)
    if precondition:
        precond = Preconditioner.build(lambda: kernel_matrix(spec, landmarks), count, ridges, t)
    else:
        precond = NoPreconditioner(kernel_matrix(spec, landmarks))
    lam = np.repeat(np.asarray(ridges, dtype=np.float64), t)
    rhs = np.tile(b, (1, len(ridges)))
    monitor = None if check is None else ValidationStop(spec, landmarks, check[0], check[1],
                                                        mean, rhs.shape[1])

    def h_times(v: np.ndarray, cols: np.ndarray) -> np.ndarray:
        return row_sum(gram_block, v) + precond.kmm_times(v) * lam[cols]

    run = conjugate_gradient(h_times, rhs, precond, tol, max_iter, monitor)
    betas = [run.beta[:, i * t:(i + 1) * t] for i in range(len(ridges))]
    tiles = getattr(row_sum, "tiles", "")
    return CgFit(betas, mean, run, precond.jitter, count, tiles)
