"""The prediction engine's threads: cores, the BLAS thread bound, per-thread buffers, a pool.

The engine runs large batches on its own thread pool while holding BLAS at one thread, so
that the two levels of threading never exceed the cores, and runs single rows on cached
per-thread buffers. Those pieces live here, apart from the arithmetic in
:mod:`service.engine`.
"""

from __future__ import annotations

import os
import threading
from concurrent.futures import ThreadPoolExecutor

import numpy as np


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


def buffers(size: int, dtype=np.float64) -> tuple[np.ndarray, np.ndarray]:
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
def _thread_knobs(lib) -> tuple:
    """(get, set) thread-count functions of one BLAS library (a threadpoolctl controller).

    For OpenBLAS on its own threads, the library's C functions themselves (~0.2 µs a call;
    threadpoolctl's Python wrappers cost ~2 µs, which the single-row path would pay several
    times); for anything else, threadpoolctl's methods.
    """
    if lib.internal_api == "openblas" and getattr(lib, "threading_layer", None) != "openmp":
        dynlib = getattr(lib, "dynlib", None)
        for prefix in ("", "scipy_"):
            for suffix in ("", "64_", "_64"):
                get = getattr(dynlib, f"{prefix}openblas_get_num_threads{suffix}", None)
                put = getattr(dynlib, f"{prefix}openblas_set_num_threads{suffix}", None)
                if get is not None and put is not None:
                    return get, put

    def put(threads: int) -> None:
        lib.set_num_threads(threads)
        # threadpoolctl lets one thread at a time own OpenBLAS's process-wide setting:
        # give it back so the caller's own limits keep working
        clear = getattr(type(lib), "clear_controlling_thread", None)
        if clear is not None:
            clear()

    return lib.get_num_threads, put


def _numpy_blas(libs: list) -> list:
    """The BLAS libraries numpy's own products run on, among the loaded ones.

    The engine calls BLAS through numpy only; a second OpenBLAS (scipy's, in a notebook or a
    bench that also loads scipy) is never on its path and costs a thread-count query and a
    set and restore per call if held as well. Those bundled with numpy sit in its package
    folder (or its ``numpy.libs`` sibling); where none does (numpy linked against a system
    BLAS), every loaded BLAS is held.
    """
    home = os.path.dirname(os.path.realpath(np.__file__))
    folders = (home + os.sep, home + ".libs" + os.sep)
    own = [lib for lib in libs if os.path.realpath(lib.filepath).startswith(folders)]
    return own or list(libs)


class _SingleThreadedBlas:
    """Context holding BLAS at one thread while the engine runs (re-entrant, counted).

    BLAS's own threads would split each small tile product and wait on each other
    (milliseconds per tile when the cores are busy), and a parallel batch already uses every
    core. Limits are process-wide; counting entries means that two overlapping calls do not
    restore the BLAS thread count under each other's feet. The libraries are found once (a
    scan of every loaded library, ~ms); after that a call costs one thread-count query per
    library, plus a set and a restore when BLAS is not at one thread already (the service
    runs with one): under 1 µs in all.
    """

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._depth = 0
        self._knobs: list[tuple] | None = None
        self._saved: list[tuple] = []

    def __enter__(self) -> None:
        with self._lock:
            if self._depth == 0:
                knobs = self._knobs
                if knobs is None:
                    from threadpoolctl import ThreadpoolController

                    libs = ThreadpoolController().select(user_api="blas").lib_controllers
                    knobs = self._knobs = [_thread_knobs(lib) for lib in _numpy_blas(libs)]
                for get, put in knobs:
                    threads = get()
                    if threads is not None and threads != 1:
                        put(1)
                        self._saved.append((put, threads))
            self._depth += 1

    def at_one(self) -> bool:
        """True when every BLAS library runs one thread already (a lock-free query, for
        the single-row path: if another call changes the count meanwhile, a product may
        merely run on more threads than it needs)."""
        knobs = self._knobs
        if knobs is None:
            return False
        for get, _ in knobs:  # noqa: SIM110 (all() over a generator costs twice as much here)
            if get() != 1:
                return False
        return True

    def __exit__(self, *exc) -> None:
        with self._lock:
            self._depth -= 1
            if self._depth == 0 and self._saved:
                for put, threads in self._saved:
                    put(threads)
                self._saved = []


single_blas = _SingleThreadedBlas()
_pools: dict[tuple[int, int], ThreadPoolExecutor] = {}
_pools_lock = threading.Lock()


def pool(threads: int) -> ThreadPoolExecutor:
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
