"""Prediction engine: f(Q) = k(Q, X)·α evaluated tile by tile in bounded memory.

One engine serves the HTTP service, ``load_model().predict`` and ``kridge predict``. The
kernel matrix between a batch and the training rows is never built whole: the batch is cut
into row tiles and the training rows into column tiles so that one tile (plus its scratch
twin) stays in the per-core L2 cache, the kernel's elementwise step runs in place on each tile
(:func:`service.kernels.kernel_tile`), and the tile's product with α is accumulated. Extra
memory is O(tile × threads) whatever the batch size.

Two paths:

* lean (fewer than :data:`PARALLEL_MIN_ROWS` rows, or one thread): runs in the caller's
  thread on per-thread cached buffers; no hand-off, no copies of input already float64 and
  C-ordered, no re-validation. This is the HTTP service's path.
* parallel: row blocks go to a persistent thread pool (numpy releases the GIL inside its
  loops and BLAS), while BLAS itself is held to one thread so that the two levels of
  threading never exceed the cores.
"""

from __future__ import annotations

import os
import threading
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from service.kernels import (
    KernelSpec,
    augmented_columns,
    augmented_rows,
    kernel_tile,
    prepare_columns,
    prepare_rows,
)

#: Elements in one kernel tile: 2¹⁶ float64 = 512 KiB. With the scratch twin that some
#: kernels need it is 1 MiB, half of the 2 MiB per-core L2 of the machines we measured, so
#: the five or six passes over a tile after the matrix product run from L2, not from L3.
#: Larger tiles measured no faster; smaller ones pay numpy's per-call overhead (~1 µs × ~8
#: calls per tile) too often.
TILE_ELEMENTS = 1 << 16
#: Query rows per tile. 128 rows × 512 columns keeps the matrix product efficient (inner
#: dimension is only d) while one row tile's share of X is re-read from L3, not DRAM.
ROW_TILE = 128
#: Query rows per tile for the laplacian: its per-feature passes broadcast a query column
#: against a training row, and numpy runs those faster on few long rows than on many short.
ROW_TILE_L1 = 16
#: Below this many query rows everything runs in the caller's thread: the work (~50 µs per
#: row at 20,000 training rows) is then too small to repay a thread hand-off.
PARALLEL_MIN_ROWS = 64


def available_cores() -> int:
    """Cores this process may run on (affinity mask when the OS exposes one)."""
    try:
        return len(os.sched_getaffinity(0)) or 1
    except AttributeError:  # not on Linux
        return os.cpu_count() or 1


def engine_threads() -> int:
    """Threads a large batch may use: ``KRIDGE_ENGINE_THREADS``, else every core.

    Never more than the cores: the gunicorn config sets this to cores // workers so that
    workers × threads ≤ cores.
    """
    cores = available_cores()
    value = os.environ.get("KRIDGE_ENGINE_THREADS", "").strip()
    if value.isdigit() and int(value) > 0:
        return min(int(value), cores)
    return cores


# -- per-thread scratch -------------------------------------------------------------------
_local = threading.local()


def _buffers(size: int, dtype=np.float64) -> tuple[np.ndarray, np.ndarray]:
    """Two flat buffers of at least ``size`` elements of ``dtype``, cached per thread.

    Reusing them avoids two allocations per call on the single-row path; a thread holds at
    most 2 × TILE_ELEMENTS × 8 bytes (1 MiB) per precision it has used.
    """
    cache = getattr(_local, "bufs", None)
    if cache is None:
        cache = _local.bufs = {}
    key = np.dtype(dtype).char
    bufs = cache.get(key)
    if bufs is None or bufs[0].size < size:
        bufs = cache[key] = (np.empty(size, dtype), np.empty(size, dtype))
    return bufs


# -- BLAS thread bound ----------------------------------------------------------------------
class _SingleThreadedBlas:
    """Context holding BLAS at one thread while any parallel batch runs (re-entrant, counted).

    Limits are process-wide; counting entries means that two overlapping large batches do
    not restore the BLAS thread count under each other's feet. The threadpoolctl controller
    is built once: building it scans every loaded library (~ms), setting a limit is µs.
    """

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._depth = 0
        self._controller = None
        self._limiter = None

    def __enter__(self) -> None:
        with self._lock:
            if self._depth == 0:
                if self._controller is None:
                    from threadpoolctl import ThreadpoolController

                    self._controller = ThreadpoolController().select(user_api="blas")
                # Under the service's OPENBLAS_NUM_THREADS=1 there is nothing to change:
                # one query per library (~1 µs) instead of a set and a restore.
                if any(lib.num_threads != 1 for lib in self._controller.lib_controllers):
                    self._limiter = self._controller.limit(limits=1)
            self._depth += 1

    def __exit__(self, *exc) -> None:
        with self._lock:
            self._depth -= 1
            if self._depth == 0 and self._limiter is not None:
                self._limiter.restore_original_limits()
                self._limiter = None


_single_blas = _SingleThreadedBlas()
_pools: dict[tuple[int, int], ThreadPoolExecutor] = {}
_pools_lock = threading.Lock()


def _pool(threads: int) -> ThreadPoolExecutor:
    """A persistent pool per size, rebuilt after a fork (a forked pool has no threads)."""
    key = (os.getpid(), threads)
    pool = _pools.get(key)
    if pool is None:
        with _pools_lock:
            pool = _pools.get(key)
            if pool is None:
                pool = ThreadPoolExecutor(threads, thread_name_prefix="kridge-engine")
                _pools[key] = pool
    return pool


class Engine:
    """Tiled evaluator of k(Q, X)·α for one fitted model.

    Parameters
    ----------
    spec : kernel and parameters.
    x_train : (n, d) standardized training rows. A float64 C-ordered array (such as a
        read-only memory map) is used as is, never copied.
    dual : (n,) or (n, t) dual coefficients α.
    threads : worker threads for large batches (default :func:`engine_threads`).
    tile_elements, row_tile : tile geometry (defaults :data:`TILE_ELEMENTS`,
        :data:`ROW_TILE`); tests shrink them to force many tiles.
    dtype : ``np.float64`` (default, exact) or ``np.float32``: kernel tiles in single precision
        (half the memory traffic, twice the SIMD width), each tile's product with α summed
        into a float64 result. Opt-in only, per model: the trainer measures and records the
        largest difference it makes on the model's own training rows.

    Notes
    -----
    ``predict(Q)[i, t] = Σ_j k(q_i, x_j) α_jt``, summed tile by tile over j. The training
    half of every distance (c‖x_j‖², or γΣ_k x_jk for the laplacian) is computed here once.
    """

    def __init__(
        self,
        spec: KernelSpec,
        x_train: np.ndarray,
        dual: np.ndarray,
        threads: int | None = None,
        tile_elements: int | None = None,
        row_tile: int | None = None,
        dtype=np.float64,
    ):
        self.spec = spec
        self.dtype = np.dtype(dtype)
        if self.dtype not in (np.float64, np.float32):
            raise ValueError(f"engine precision must be float64 or float32, not {self.dtype}")
        # np.asarray drops the memmap subclass (whose per-view Python hooks cost µs per
        # slice) but keeps the same memory; only a wrong dtype or a strided view forces a
        # copy. Row-major and column-major (how bundles store laplacian models) both serve.
        x = np.asarray(x_train)
        if x.dtype != self.dtype:
            x = x.astype(self.dtype, order="K")
        if not (x.flags.c_contiguous or x.flags.f_contiguous):
            x = np.ascontiguousarray(x)
        self.x = x
        dual = np.asarray(dual, dtype=self.dtype)
        self.dual = np.ascontiguousarray(dual if dual.ndim == 2 else dual[:, None])
        if self.x.ndim != 2 or self.dual.shape[0] != self.x.shape[0]:
            raise ValueError(
                f"training rows {self.x.shape} and dual coefficients {self.dual.shape} disagree"
            )
        self.n, self.d = self.x.shape
        self.targets = self.dual.shape[1]
        self.threads = max(1, threads or engine_threads())
        self.tile_elements = tile_elements or TILE_ELEMENTS
        default_rows = ROW_TILE_L1 if spec.uses == "l1" else ROW_TILE
        self.row_tile = max(1, min(row_tile or default_rows, self.tile_elements))
        # (d, n) view, read by BLAS as a transposed operand: no copy. The laplacian's
        # per-feature passes want each feature's values contiguous: a column-major X gives
        # that for free; a row-major one gets a private feature-major copy here.
        self.xt = self.x.T
        if spec.uses == "l1" and not self.xt.flags.c_contiguous:
            self.xt = np.ascontiguousarray(self.xt)
        self.col = prepare_columns(spec, self.x)
        self._aug: np.ndarray | None = None
        self._aug_lock = threading.Lock()

    def _augmented(self) -> np.ndarray:
        """[xᵀ; 1; −c‖x‖²] for distance kernels, built on the first large batch.

        Batches fold the row and column terms into the matrix product (one pass fewer per
        term over every tile: about 1.9× faster at 1,000 rows here). The copy is private to
        the process, so the lean single-row path keeps reading the shared memory map and a
        service worker pays the (d + 2)·n·8 bytes only once it is sent batches.
        """
        if self._aug is None:
            with self._aug_lock:
                if self._aug is None:
                    self._aug = augmented_columns(self.spec, self.x).astype(self.dtype)
        return self._aug

    # -- core ----------------------------------------------------------------------------
    def _rows(self, q: np.ndarray, out: np.ndarray, augmented: bool = False) -> None:
        """Write k(q, X)·α for the rows ``q`` (m, d) into ``out`` (m, t), in this thread."""
        m = q.shape[0]
        spec, n, xt, col, dual = self.spec, self.n, self.xt, self.col, self.dual
        if augmented:
            xt, col = self._augmented(), None
        r = min(m, self.row_tile)
        cols = min(n, max(1, self.tile_elements // r))
        single = self.dtype == np.float32
        flat, flat2 = _buffers(r * cols, self.dtype)
        acc = np.empty((r, self.targets), self.dtype) if cols < n or single else None
        for i in range(0, m, r):
            qi = q[i : i + r]
            ri = qi.shape[0]
            qs, row = (augmented_rows(spec, qi), None) if augmented else prepare_rows(spec, qi)
            if single:
                qs = qs.astype(np.float32)
                row = None if row is None else row.astype(np.float32)
            oi = out[i : i + r]
            for j in range(0, n, cols):
                w = min(cols, n - j)
                tile = flat[: ri * w].reshape(ri, w)
                kernel_tile(
                    spec,
                    qs,
                    row,
                    xt[:, j : j + w],
                    None if col is None else col[j : j + w],
                    tile,
                    flat2[: ri * w].reshape(ri, w),
                )
                if j == 0 and not single:
                    np.matmul(tile, dual[j : j + w], out=oi)
                elif j == 0:
                    a = acc[:ri]
                    np.matmul(tile, dual[j : j + w], out=a)
                    oi[:] = a  # float32 tile sums, accumulated in float64
                else:
                    a = acc[:ri]
                    np.matmul(tile, dual[j : j + w], out=a)
                    oi += a

    def predict(self, q: np.ndarray) -> np.ndarray:
        """k(q, X)·α for standardized rows ``q`` (m, d); returns (m, t).

        No checks beyond shape: callers (``Model.predict``, the HTTP layer) validate values.
        """
        q = np.ascontiguousarray(q, dtype=np.float64)
        if q.ndim != 2 or q.shape[1] != self.d:
            raise ValueError(f"expected rows of {self.d} features, got shape {q.shape}")
        m = q.shape[0]
        out = np.empty((m, self.targets))
        if m == 0:
            return out
        batch = m >= PARALLEL_MIN_ROWS and self.spec.uses == "sqdist"
        if m < PARALLEL_MIN_ROWS or self.threads == 1:
            # BLAS's own threads would split each small tile product and wait on each
            # other (milliseconds per tile when the cores are busy): our tiles stay serial.
            with _single_blas:
                self._rows(q, out, batch)
            return out
        # Blocks of whole row tiles, at least two per thread so a thread slowed by a
        # neighbour's work on a shared core does not hold up the rest.
        per = -(-m // (2 * self.threads))
        step = max(self.row_tile, -(-per // self.row_tile) * self.row_tile)
        pool = _pool(self.threads)
        with _single_blas:
            futures = [
                pool.submit(self._rows, q[s : s + step], out[s : s + step], batch)
                for s in range(0, m, step)
            ]
            for f in futures:
                f.result()
        return out
