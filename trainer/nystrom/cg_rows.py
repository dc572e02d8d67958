"""The training rows of a CG fit, held in this process: sums over them on every core.

CG passes over the rows tens of times, so the training part's standardized rows are kept
(n·(d + t)·8 bytes: 72 MB for a million rows of 8 inputs and one target), never K_nm
(n·m·8 bytes: 80 GB at m = 10,000). A pass splits each file block's rows into chunks of
:data:`trainer.nystrom.cg.CHUNK_ROWS`, one thread per core with single-threaded BLAS
(:func:`trainer.nystrom.pass2.in_threads`), adds the chunks' sums in order within the block
and the blocks' sums in block order, exactly as a Dask worker sums its block
(:func:`trainer.nystrom.cg.block_total`): the same sums on any number of cores or workers.
"""

from __future__ import annotations

import numpy as np

from service.kernels import KernelBlocks, KernelSpec
from trainer.nystrom.cg import TILE_DTYPE, tiles_text
from trainer.nystrom.cg import chunks as _chunks
from trainer.nystrom.pass2 import in_threads


class LocalRows:
    """``rows(fn, *args)`` = Σ_blocks Σ_chunks fn(kern, x_chunk, y_chunk, *args), in order.

    ``block_rows``: the training rows each file block gave (all rows one block if omitted);
    ``dtype``: the kernel tiles' precision (:data:`trainer.nystrom.cg.TILE_DTYPE`).
    """

    def __init__(self, spec: KernelSpec, landmarks: np.ndarray, x_s: np.ndarray,
                 y: np.ndarray, block_rows: list[int] | None = None, dtype=TILE_DTYPE):
        self.kern = KernelBlocks(spec, landmarks, dtype=dtype)
        self.tiles = tiles_text(self.kern.dtype)
        self.x, self.y = np.ascontiguousarray(x_s), np.ascontiguousarray(y)
        self.count = int(x_s.shape[0])
        self.mean = self.y.mean(axis=0) if self.count else np.zeros(y.shape[1])
        edges = np.cumsum([0, *(block_rows or [self.count])])
        self.work = [(b, s) for b, (lo, hi) in enumerate(zip(edges[:-1], edges[1:],
                                                             strict=True))
                     for s in _chunks(int(lo), int(hi))]

    def __call__(self, fn, *args) -> np.ndarray:
        results = in_threads(lambda w: (w[0], fn(self.kern, self.x[w[1]], self.y[w[1]], *args)),
                             self.work)
        total, current, block = None, None, -1
        for b, part in results:
            if b != block and current is not None:
                total = current if total is None else total + current
                current = None
            block = b
            current = part if current is None else current + part
        if current is not None:
            total = current if total is None else total + current
        return total
