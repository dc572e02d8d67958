"""Prediction engine: f(Q) = k(Q, X)·α evaluated tile by tile in bounded memory.

One engine serves the HTTP service, ``load_model().predict`` and ``kridge predict``. The
kernel matrix between a batch and the training rows is never built whole: the batch is cut
into row tiles and the training rows into column tiles sized to stay in cache, the kernel's
elementwise step runs in place on each tile, and the tile's product with α is accumulated.
Extra memory is therefore O(tile) whatever the batch size.
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor

import numpy as np
from threadpoolctl import threadpool_limits

from service.kernels import KernelSpec, kernel_block, row_sq_norms

#: Elements in one kernel tile: 2¹⁷ float64 = 1 MiB, about an L2 cache here.
TILE_ELEMENTS = 1 << 17
#: Rows per tile in the row direction for large batches.
TILE_ROWS = 256
#: Below this many query rows the lean path runs: one thread, no hand-off.
PARALLEL_MIN_ROWS = 2 * TILE_ROWS


def engine_threads() -> int:
    """Threads a large batch may use: ``KRIDGE_ENGINE_THREADS``, else every core."""
    value = os.environ.get("KRIDGE_ENGINE_THREADS")
    if value and value.isdigit() and int(value) > 0:
        return int(value)
    return os.cpu_count() or 1


class Engine:
    """Tiled evaluator of k(Q, X)·α for one fitted model.

    Parameters
    ----------
    spec : kernel and parameters.
    x_train : (n, d) standardized training rows (may be a read-only memory map).
    dual : (n, t) dual coefficients α.
    threads : worker threads for large batches (default :func:`engine_threads`).
    """

    def __init__(
        self, spec: KernelSpec, x_train: np.ndarray, dual: np.ndarray, threads: int | None = None
    ):
        self.spec = spec
        self.x = x_train
        self.dual = dual if dual.ndim == 2 else dual[:, None]
        self.n, self.d = x_train.shape
        self.threads = threads or engine_threads()
        # Precomputed once at load: the training half of every squared distance.
        self.x_sq = row_sq_norms(x_train) if spec.uses == "sqdist" else None

    def _cols_for(self, rows: int) -> int:
        return max(64, min(self.n, TILE_ELEMENTS // max(rows, 1)))

    def _block(self, q: np.ndarray, out: np.ndarray) -> None:
        """Accumulate k(q, X)·α into ``out`` for one row tile, walking column tiles."""
        m = q.shape[0]
        cols = self._cols_for(m)
        q_sq = row_sq_norms(q) if self.x_sq is not None else None
        buf = np.empty((m, cols))
        scratch = np.empty((m, cols)) if self.spec.uses != "dot" else None
        for start in range(0, self.n, cols):
            stop = min(start + cols, self.n)
            w = stop - start
            tile = buf[:, :w]
            kernel_block(
                self.spec,
                q,
                self.x[start:stop],
                x_sq=None if self.x_sq is None else self.x_sq[start:stop],
                q_sq=q_sq,
                out=tile,
                scratch=None if scratch is None else scratch[:, :w],
            )
            out += tile @ self.dual[start:stop]

    def predict(self, q: np.ndarray) -> np.ndarray:
        """k(q, X)·α for standardized rows ``q`` (m, d); returns (m, t)."""
        q = np.ascontiguousarray(q, dtype=np.float64)
        m = q.shape[0]
        out = np.zeros((m, self.dual.shape[1]))
        if m < PARALLEL_MIN_ROWS or self.threads == 1:
            for start in range(0, m, TILE_ROWS):
                self._block(q[start : start + TILE_ROWS], out[start : start + TILE_ROWS])
            return out
        starts = range(0, m, TILE_ROWS)
        # Our threads split the rows; BLAS inside each must stay single-threaded or the
        # two levels of threading fight over the same cores.
        with threadpool_limits(1, user_api="blas"), ThreadPoolExecutor(self.threads) as pool:
            list(
                pool.map(
                    lambda s: self._block(q[s : s + TILE_ROWS], out[s : s + TILE_ROWS]), starts
                )
            )
        return out
