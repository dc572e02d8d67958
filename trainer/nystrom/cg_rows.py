"""The training rows of a CG fit, held in this process: sums over them on every core.

CG passes over the rows tens of times, so the training part's standardized rows are kept
(n·(d + t)·8 bytes: 72 MB for a million rows of 8 inputs and one target), never K_nm
(n·m·8 bytes: 80 GB at m = 10,000). A pass splits the rows into chunks of
:data:`CHUNK_ROWS`, one thread per core with single-threaded BLAS
(:func:`trainer.nystrom.pass2.in_threads`), and adds the chunks' sums in chunk order, so the
result does not depend on the number of cores.
"""

from __future__ import annotations

import numpy as np

from service.kernels import KernelBlocks, KernelSpec
from trainer.nystrom.pass2 import in_threads

#: Rows per chunk of a pass: enough tiles per thread to hide the hand-over.
CHUNK_ROWS = 8192


class LocalRows:
    """``rows(fn, *args)`` = Σ_chunks fn(kern, x_chunk, y_chunk, *args), in chunk order."""

    def __init__(self, spec: KernelSpec, landmarks: np.ndarray, x_s: np.ndarray,
                 y: np.ndarray):
        self.kern = KernelBlocks(spec, landmarks)
        self.x, self.y = np.ascontiguousarray(x_s), np.ascontiguousarray(y)
        self.count = int(x_s.shape[0])
        self.mean = self.y.mean(axis=0) if self.count else np.zeros(y.shape[1])
        self.chunks = [slice(i, i + CHUNK_ROWS) for i in range(0, self.count, CHUNK_ROWS)]

    def __call__(self, fn, *args) -> np.ndarray:
        total = None
        for part in in_threads(lambda s: fn(self.kern, self.x[s], self.y[s], *args),
                               self.chunks):
            total = part if total is None else total + part
        return total
