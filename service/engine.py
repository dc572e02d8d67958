"""Prediction engine: f(Q) = k(Q, X)·α evaluated tile by tile in bounded memory.

One engine serves the HTTP service, ``load_model().predict`` and ``kridge predict``. The
kernel matrix between a batch and the training rows is never built whole: the batch is cut
into row tiles and the training rows into column tiles so that one tile (plus its scratch
twin) stays in the per-core L2 cache, the kernel's elementwise step runs in place on each tile
(:func:`service.kernels.finish_tile`), and the tile's product with α is accumulated. Extra
memory is O(tile × threads) whatever the batch size.

The tiles come from :class:`service.kernels.KernelBlocks`, the one kernel computation that
training uses too, run on buffers the engine keeps. Every kernel but the laplacian has an
affine part that one matrix product computes whole from augmented operands: −c‖q − x‖² for
the distance kernels, γ qᵀx + c₀ for the dot kernels. A single row then costs what the
machine's floor costs (one GEMV, one elementwise pass, one dot) plus a few µs of Python.
The price is a private copy of the training rows, (d + 2)·n·8 bytes per process (2.9 MB at
20,000 × 16), beside the training rows the store read into memory at load.

For distance kernels the same product also yields the squared distances to any chosen
training rows; the envelope's novelty score (k-th nearest reference row, when the reference
rows are training rows) is taken from it instead of a second product (``neighbours``).

Two paths:

* lean (fewer than :data:`PARALLEL_MIN_ROWS` rows, or one thread): runs in the caller's
  thread on per-thread cached buffers; no hand-off, no copies of input already float64 and
  C-ordered, no re-validation. This is the HTTP service's path.
* parallel: row blocks go to a persistent thread pool (numpy releases the GIL inside its
  loops and BLAS), while BLAS itself is held to one thread so that the two levels of
  threading never exceed the cores.
"""

from __future__ import annotations

import threading

import numpy as np

from service.engine_threads import buffers, engine_threads, single_blas
from service.engine_threads import pool as thread_pool
from service.envelope import kth_distances
from service.kernels import KernelBlocks, KernelSpec, finish_tile
from service.l1_distance import prepare as prepare_l1

#: Elements in one kernel tile: 2¹⁶ float64 = 512 KiB. With the scratch twin that some
#: kernels need it is 1 MiB, half of the 2 MiB per-core L2 of the machines we measured, so
#: the five or six passes over a tile after the matrix product run from L2, not from L3.
#: Larger tiles measured no faster; smaller ones pay numpy's per-call overhead (~1 µs × ~8
#: calls per tile) too often.
TILE_ELEMENTS = 1 << 16
#: Query rows per tile. 128 rows × 512 columns keeps the matrix product efficient (inner
#: dimension is only d) while one row tile's share of X is re-read from L3, not DRAM.
ROW_TILE = 128
#: Query rows per tile for the laplacian. Its compiled distance loop
#: (:mod:`service.l1_distance`) keeps a chunk of training values in L2 across the tile's
#: rows; 16 rows × 4,096 columns keeps the exp and the product with α in L2 as well.
ROW_TILE_L1 = 16
#: From this many query rows a batch is split by rows across the engine's threads.
PARALLEL_MIN_ROWS = 64
#: A smaller batch (no neighbour distances asked) whose work is at least this many rbf
#: kernel values' worth (rows × training rows × :data:`SPLIT_WEIGHT`) is split by training
#: columns instead, one share per thread, the partial sums added at the end: from here the
#: work repays the hand-off and the two threads' turns at the GIL between numpy calls
#: (DEVELOPERS.md, "Measured limits"). Below it, and for every single-tile batch, the
#: caller's thread does all.
COLUMN_SPLIT_MIN = 1 << 18
#: Cost of one kernel value relative to rbf's (at d = 16): the Matérn kernels' square root
#: and exp, the laplacian's d absolute differences.
SPLIT_WEIGHT = {"matern32": 2.5, "matern52": 2.5, "laplacian": 2.0}


class Engine:
    """Tiled evaluator of k(Q, X)·α for one fitted model.

    Parameters
    ----------
    spec : kernel and parameters.
    x_train : (n, d) standardized training rows. A float64 array (such as the read-only
        array the store loads) is read as is; kernels with an affine part keep a private augmented
        copy (see the module notes), the laplacian a feature-major view or copy.
    dual : (n,) or (n, t) dual coefficients α.
    threads : worker threads for large batches (default :func:`engine_threads`).
    tile_elements, row_tile : tile geometry (defaults :data:`TILE_ELEMENTS`,
        :data:`ROW_TILE`); tests shrink them to force many tiles.
    dtype : ``np.float64`` (default, exact) or ``np.float32``: kernel tiles in single precision
        (half the memory traffic, twice the SIMD width), each tile's product with α summed
        into a float64 result. Opt-in only, per model: the trainer measures and records the
        largest difference it makes on the model's own training rows.
    neighbours : optional ``(rows, k)``: indices of training rows and a count k. For a
        distance kernel in float64, ``predict(q, near=...)`` then also writes each query's
        Euclidean distance to its k-th nearest of those rows, taken from the product the
        prediction computes anyway (:attr:`gives_neighbours`).
    shift, scale, offset : optional standardization s(x) = (x − shift) / scale and (t,)
        offset for ``predict(x, raw=True)``, which returns k(s(x), X)·α + offset. The
        standardization is folded into the query operand, (x − shift)·(f/scale), and the
        offset into the product with α, so raw rows cost no extra pass.

    Notes
    -----
    ``predict(Q)[i, t] = Σ_j k(q_i, x_j) α_jt``, summed tile by tile over j. The training
    half of every affine part (c‖x_j‖², c₀) is computed here once.
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
        neighbours: tuple[np.ndarray, int] | None = None,
        shift: np.ndarray | None = None,
        scale: np.ndarray | None = None,
        offset: np.ndarray | None = None,
    ):
        self.spec = spec
        self.dtype = np.dtype(dtype)
        if self.dtype not in (np.float64, np.float32):
            raise ValueError(f"engine precision must be float64 or float32, not {self.dtype}")
        # np.asarray drops any ndarray subclass (a memmap's per-view Python hooks cost µs per
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
        # X̃, or for the laplacian X feature-major (a column-major X, as laplacian bundles
        # store it, is used as it is; a row-major one gets a private copy)
        self.blocks = KernelBlocks(spec, self.x, self.dtype, shift, scale)
        if spec.uses == "l1":
            # compiled for the very arrays requests pass (a read-only bundle array is
            # another numba argument type than a writable one)
            prepare_l1(self.blocks.columns)
        self._near: tuple[np.ndarray, int] | None = None
        if neighbours is not None and spec.uses == "sqdist" and self.dtype == np.float64:
            rows, k = neighbours
            rows = np.unique(np.asarray(rows, dtype=np.intp))
            if rows.size and (rows[0] < 0 or rows[-1] >= self.n):
                raise ValueError("neighbour rows must index training rows")
            if rows.size:
                self._near = (rows, min(int(k), rows.size) - 1)
        self._splits: dict[int, list[tuple[int, int, np.ndarray]]] = {}
        self._tls = threading.local()
        self.shift = shift
        self.offset = np.zeros(self.targets) if offset is None else (
            np.asarray(offset, dtype=np.float64).reshape(self.targets))
        # [α; offset] for the single-tile path (float64 with an affine part only)
        self._fast_ok = spec.uses != "l1" and self.dtype == np.float64
        self._dual_ext = np.vstack([self.dual, self.offset[None, :]]) if self._fast_ok else None
        self._fast_rows = self.tile_elements // self.n if self._fast_ok else 0
        self._split_from = COLUMN_SPLIT_MIN / SPLIT_WEIGHT.get(spec.name, 1.0)

    @property
    def gives_neighbours(self) -> bool:
        """True when ``predict`` can also give the k-th neighbour distances (``near``)."""
        return self._near is not None

    # -- core ----------------------------------------------------------------------------
    def _scratch(self, rows: int) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
        """Per-thread (query operand, product accumulator, neighbour gather) for row tiles."""
        bufs = getattr(self._tls, "bufs", None)
        if bufs is None or bufs[0].shape[0] < rows:
            rows = max(rows, self.row_tile if rows > 1 else 1)
            near = None if self._near is None else np.empty((rows, self._near[0].size))
            bufs = self._tls.bufs = (
                self.blocks.rows_buffer(rows),
                np.empty((rows, self.targets), self.dtype),
                near,
            )
        return bufs

    def _one_tile(self, m: int) -> tuple:
        """Per-thread views for a batch of ``m`` rows that fits one tile, built once per
        size so that a call makes no new arrays but its result: (Q̃, its leading block,
        the tile extended by one column [K | 1] for the product with [α; offset], the tile,
        scratch, neighbour gather)."""
        views = getattr(self._tls, "views", None)
        if views is None:
            views = self._tls.views = {}
        got = views.get(m)
        if got is None:
            n = self.n
            flat, flat2 = buffers(m * (n + 1), self.dtype)
            qa = self.blocks.rows_buffer(m)
            ext = flat[: m * (n + 1)].reshape(m, n + 1)
            gather = self._scratch(m)[2]
            got = views[m] = (
                qa,
                qa[:, : self.d],
                ext,
                ext[:, :n],
                flat2[: m * n].reshape(m, n),
                None if gather is None else gather[:m],
            )
        return got

    def _split(self, cols: int) -> list[tuple[int, int, np.ndarray]]:
        """Per column tile of width ``cols``: the neighbour rows it holds (start, stop in
        the sorted neighbour list, positions within the tile)."""
        split = self._splits.get(cols)
        if split is None:
            rows = self._near[0]
            split = []
            for j in range(0, self.n, cols):
                lo, hi = np.searchsorted(rows, [j, j + cols])
                split.append((int(lo), int(hi), rows[lo:hi] - j))
            self._splits[cols] = split
        return split

    def _rows(
        self, q: np.ndarray, out: np.ndarray, near: np.ndarray | None = None, raw: bool = False,
        columns: tuple[int, int] | None = None,
    ) -> None:
        """Write k(q, X)·α for the rows ``q`` (m, d) into ``out`` (m, t), in this thread;
        with ``near`` (m,) also the k-th neighbour distances. ``columns``: only the
        training rows [j0, j1) contribute (a share of a column split; not with ``near``)."""
        m = q.shape[0]
        spec, n, dual = self.spec, self.n, self.dual
        first, n = (0, n) if columns is None else columns  # n: the end of the range now
        blocks = self.blocks
        r = min(m, self.row_tile)
        cols = min(n - first, max(1, self.tile_elements // r))
        single = self.dtype == np.float32
        flat, flat2 = buffers(r * cols, self.dtype)
        qbuf, acc, gather = self._scratch(r)
        split = self._split(cols) if near is not None else None
        for i in range(0, m, r):
            qi = q[i : i + r]
            ri = qi.shape[0]
            qs = blocks.rows(qi, qbuf[:ri], raw)
            oi = out[i : i + r]
            for t, j in enumerate(range(first, n, cols)):
                w = min(cols, n - j)
                tile = flat[: ri * w].reshape(ri, w)
                scratch = flat2[: ri * w].reshape(ri, w)
                blocks.exponent(qs, tile, j)
                if split is not None:  # u = −c‖q − x‖² of the neighbour rows, before exp
                    lo, hi, at = split[t]
                    np.take(tile, at, axis=1, out=gather[:ri, lo:hi], mode="clip")
                finish_tile(spec, tile, scratch)
                if j == first and not single:
                    np.matmul(tile, dual[j : j + w], out=oi)
                else:
                    a = acc[:ri]
                    np.matmul(tile, dual[j : j + w], out=a)
                    if j == first:
                        oi[:] = a  # float32 tile sums, accumulated in float64
                    else:
                        oi += a
            if near is not None:
                kth_distances(gather[:ri], self._near[1], self.blocks.c, near[i : i + ri])

    def _fast(self, q: np.ndarray, near: np.ndarray | None, raw: bool) -> np.ndarray:
        """A batch that fits one tile, float64, affine kernel: one product, one elementwise
        step, one product with [α; offset] (the offset added by the same product), on views
        built once (the single-row path)."""
        qa, head, ext, tile, scratch, gather = self._one_tile(q.shape[0])
        blocks = self.blocks
        blocks.exponent(blocks.rows(q, qa, raw, head), tile)
        if near is not None:
            np.take(tile, self._near[0], axis=1, out=gather, mode="clip")
        finish_tile(self.spec, tile, scratch)
        ext[:, self.n] = 1.0 if raw else 0.0
        out = np.dot(ext, self._dual_ext)  # np.dot: ~1 µs less set-up than matmul here
        if near is not None:
            kth_distances(gather, self._near[1], self.blocks.c, near)
        return out

    def _column_split(self, q: np.ndarray, out: np.ndarray, raw: bool) -> None:
        """A small batch on every thread: thread i sums over its own share of the training
        rows into its own (m, t) part; the parts are added in a fixed order, so the answer
        does not depend on which thread finished first."""
        step = -(-self.n // self.threads)
        shares = [(j, min(j + step, self.n)) for j in range(0, self.n, step)]
        parts = [out] + [np.empty_like(out) for _ in shares[1:]]
        pool = thread_pool(self.threads)
        futures = [pool.submit(self._rows, q, part, None, raw, share)
                   for part, share in zip(parts[1:], shares[1:], strict=True)]
        self._rows(q, out, None, raw, shares[0])  # the caller's thread takes the first share
        for f, part in zip(futures, parts[1:], strict=True):
            f.result()
            out += part

    def predict(
        self, q: np.ndarray, near: np.ndarray | None = None, raw: bool = False
    ) -> np.ndarray:
        """k(q, X)·α for standardized rows ``q`` (m, d); returns (m, t).

        ``near`` : optional (m,) float64 array that receives the k-th neighbour distances
        (only when :attr:`gives_neighbours`). ``raw``: the rows are in raw units and the
        standardization given at construction applies. No checks beyond shape: callers
        (``Model.predict``, the HTTP layer) validate values.
        """
        if not (type(q) is np.ndarray and q.dtype == np.float64 and q.flags.c_contiguous):
            q = np.ascontiguousarray(q, dtype=np.float64)
        shape = q.shape
        if len(shape) != 2 or shape[1] != self.d:
            raise ValueError(f"expected rows of {self.d} features, got shape {shape}")
        if near is not None and self._near is None:
            raise ValueError("this engine was built without neighbour rows")
        if raw and self.shift is None:
            raise ValueError("this engine was built without a standardization")
        m = shape[0]
        if 0 < m <= self._fast_rows:
            if single_blas.at_one():
                return self._fast(q, near, raw)
            with single_blas:
                return self._fast(q, near, raw)
        out = np.empty((m, self.targets))
        if m == 0:
            return out
        if m < PARALLEL_MIN_ROWS or self.threads == 1:
            with single_blas:
                if near is None and self.threads > 1 and m * self.n >= self._split_from:
                    self._column_split(q, out, raw)
                else:
                    self._rows(q, out, near, raw)
            if raw:
                out += self.offset
            return out
        # Blocks of whole row tiles, at least two per thread so a thread slowed by a
        # neighbour's work on a shared core does not hold up the rest.
        per = -(-m // (2 * self.threads))
        step = max(self.row_tile, -(-per // self.row_tile) * self.row_tile)
        pool = thread_pool(self.threads)
        with single_blas:
            futures = [
                pool.submit(self._rows, q[s : s + step], out[s : s + step],
                            None if near is None else near[s : s + step], raw)
                for s in range(0, m, step)
            ]
            for f in futures:
                f.result()
        if raw:
            out += self.offset
        return out
