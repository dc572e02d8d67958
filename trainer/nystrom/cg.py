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

Stopping rules (the loop: :mod:`trainer.nystrom.cg_loop`): per column of the right-hand
side, the relative residual of the preconditioned system ‖Bᵀ(b − Hβ_k)‖ / ‖Bᵀb‖ falls to
``tol``, the validation rule of :mod:`trainer.nystrom.cg_stop` stops it, or ``max_iter``
iterations ran (the record says which, per column).

Start: β₀ = 0, or a warm start (the tuning sample's own Nyström fit,
:mod:`trainer.nystrom.cg_start`): w₀ = B⁻¹β₀ = A T β₀, and H β₀ is summed in the pass that
forms b, so the start costs no pass of its own.

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

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import scipy.linalg as sla

from service.kernels import KernelBlocks, KernelSpec, finish_tile, kernel_matrix
from trainer.nystrom.cg_loop import CG_MAX_ITER, CG_TOL, CgRun, conjugate_gradient
from trainer.nystrom.cg_precond import NoPreconditioner, Preconditioner
from trainer.nystrom.cg_stop import ValidationStop

#: Kernel values per tile (1 MB of float32): one tile stays in a core's L2 cache between its
#: passes (product, kernel function, the two products with v), which memory-sized blocks
#: do not.
TILE_VALUES = 1 << 18
#: Precision of the kernel values of an iteration's tiles: float64 (default), or float32
#: (Q̃X̃ and exp in single precision; the products K_t v and K_tᵀ(K_t v) stay float64). Kept
#: float64 because float32 values bought no time once widened for the products, and moved
#: the iterates (README, "The CG solver": measured with bench/cg_bench.py).
TILE_DTYPE = np.float64


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


def cross_sums(kern: KernelBlocks, x: np.ndarray, y: np.ndarray,
               v: np.ndarray | None = None) -> np.ndarray:
    """K_xmᵀ[1, y], (m, 1 + t): the kernel's column sums and its products with the targets
    (float64 for the exact right-hand side, whatever the tiles' dtype); with an (m, c) v
    also K_xmᵀ(K_xm v) in the same tiles, (m, 1 + t + c) (a warm start's H v beside b)."""
    t = y.shape[1]
    ones_y = np.empty((x.shape[0], 1 + t))
    ones_y[:, 0] = 1.0
    ones_y[:, 1:] = y
    out = np.zeros((kern.n, 1 + t + (0 if v is None else v.shape[1])))
    for i, k in _tiles(kern, x):
        k = k.astype(np.float64, copy=False)
        right = ones_y[i:i + k.shape[0]]
        if v is not None:
            right = np.hstack([right, k @ v])
        out += k.T @ right
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


def cross_block(kern: KernelBlocks, x: np.ndarray, y: np.ndarray,
                v: np.ndarray | None = None) -> np.ndarray:
    return cross_sums(kern, x, y, v)


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
                     check: tuple[np.ndarray, np.ndarray] | None = None,
                     start: np.ndarray | None = None) -> CgFit:
    """(K_nmᵀK_nm + λ K_mm) β = K_nmᵀ(y − ȳ) for each λ in ``ridges`` by preconditioned CG.

    ``row_sum(fn, *args)`` sums ``fn(kern, x_block, y_block, *args)`` over the training
    blocks in block order (here in threads, or on Dask workers); ``mean`` is ȳ of their
    ``count`` rows. ``check``: validation rows (x, y) for the validation stopping rule
    (:mod:`trainer.nystrom.cg_stop`); without them the residual rule alone. ``start``:
    an (m, t) β₀ for every ridge (:mod:`trainer.nystrom.cg_start`), whose H β₀ is summed in
    the right-hand side's pass.
    Run to the residual rule with float64 tiles, the same β as
    :func:`trainer.nystrom.numerics.ridge_path` to the tolerance wherever K_mm has full
    rank (else the same predictions).
    """
    t = mean.size
    beta0 = None if start is None else np.tile(start, (1, len(ridges)))
    cross = row_sum(cross_block) if start is None else row_sum(cross_block, beta0)
    b = cross[:, 1:1 + t] - np.outer(cross[:, 0], mean)
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

    warm = None if start is None else (
        beta0, cross[:, 1 + t:] + precond.kmm_times(beta0) * lam)
    run = conjugate_gradient(h_times, rhs, precond, tol, max_iter, monitor, warm)
    betas = [run.beta[:, i * t:(i + 1) * t] for i in range(len(ridges))]
    tiles = getattr(row_sum, "tiles", "")
    return CgFit(betas, mean, run, precond.jitter, count, tiles)
