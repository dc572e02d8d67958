"""Scaled L1 distances for the laplacian kernel: u_ij = s · Σ_k |q_ik − x_kj|.

numpy has no fused L1 distance: built from ufuncs it makes two or three passes over the whole
tile per feature, and scikit-learn's route (scipy's ``cdist(..., "cityblock")``) is a scalar
loop. The loop below, compiled by numba, runs in SIMD registers with each output chunk held in
L1 cache while the features stream past: several times ``cdist``'s rate (DEVELOPERS.md,
"Measured limits"; ``bench/engine_bench.py --only kernels`` compares the kernels end to end).

numba is imported on first use, so models with other kernels never load it. The function is
compiled in memory (no on-disk cache: the serving filesystem may be read-only), once per
process and argument types, when an engine for a laplacian model is built (:func:`prepare`,
with the engine's own training array: a read-only memory map is another argument type than a
writable array, and numba compiles once per type). Each new compilation is logged and told to
the :data:`ON_COMPILE` listeners, marked as met while warming (:func:`warming`) or not: a
compilation outside warming is a request paying it. Where numba cannot be imported the numpy
form serves the same values, more slowly.
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Callable, Iterator
from contextlib import contextmanager

import numpy as np

log = logging.getLogger(__name__)

#: Training columns per chunk inside the compiled loop: one query row's chunk of output
#: (16 KiB in float64) stays in the 32 KiB L1 cache through all d feature passes, and the
#: chunk's training values (d × 2048) stay in L2 across the tile's query rows.
CHUNK = 2048

_lock = threading.Lock()
_kernel: Callable | None = None
_tried = False
_signatures = 0  # argument types the loop has been compiled for in this process
_warm = threading.local()

#: Called with True (while warming) or False (on a request's path) after each compilation.
ON_COMPILE: list[Callable[[bool], None]] = []


@contextmanager
def warming() -> Iterator[None]:
    """Mark compilations on this thread as part of warming a model, not a request's."""
    _warm.on = True
    try:
        yield
    finally:
        _warm.on = False


def _count_compiles(loop) -> None:
    """Tell a compilation the call just made (a dispatcher's overloads grow by one per new
    argument types); costs one dict length per call otherwise."""
    global _signatures
    n = len(loop.overloads)
    if n == _signatures:
        return
    with _lock:
        new, _signatures = n - _signatures, n
    if new <= 0:
        return
    during_warm = getattr(_warm, "on", False)
    log.info("compiled the L1 loop for new argument types (%s in this process; %s)", n,
             "while warming" if during_warm else "on a request")
    for listener in ON_COMPILE:
        listener(during_warm)


def _compile() -> Callable | None:
    """The numba-compiled loop, or None when numba cannot be imported."""
    try:
        import numba
    except Exception as exc:  # ImportError, or numba refusing this numpy version
        log.warning("numba unavailable (%s); the laplacian kernel uses the slower numpy form", exc)
        return None
    if numba.config.DISABLE_JIT:  # the loop would run as Python, far slower than numpy
        return None

    # strict IEEE arithmetic (no fastmath): measured as fast here, and a huge but finite
    # input's infinite distance must stay infinite
    @numba.njit(nogil=True, boundscheck=False, error_model="numpy", cache=False)
    def scaled_l1_loop(q, xt, j0, scale, out):
        m, w = out.shape
        d = xt.shape[0]
        for c0 in range(0, w, CHUNK):
            c1 = min(w, c0 + CHUNK)
            for i in range(m):
                # 1-D contiguous slices: with them LLVM vectorizes the inner loops
                o = out[i, c0:c1]
                x = xt[0, j0 + c0 : j0 + c1]
                qk = q[i, 0]
                for j in range(c1 - c0):
                    o[j] = abs(qk - x[j])
                for k in range(1, d):
                    x = xt[k, j0 + c0 : j0 + c1]
                    qk = q[i, k]
                    for j in range(c1 - c0):
                        o[j] += abs(qk - x[j])
                for j in range(c1 - c0):
                    o[j] *= scale
        return out

    return scaled_l1_loop


def _loop() -> Callable | None:
    global _kernel, _tried
    if not _tried:
        with _lock:
            if not _tried:
                _kernel = _compile()
                _tried = True
    return _kernel


def _give_up(exc: Exception) -> None:
    """Serve the numpy form from now on: compiling failed (a platform that forbids
    executable memory, say), and retrying would cost a compile attempt per call."""
    global _kernel
    with _lock:
        if _kernel is not None:
            log.warning("compiling the L1 loop failed (%s: %s); the laplacian kernel uses the "
                        "slower numpy form", type(exc).__name__, exc)
        _kernel = None


def compiled() -> bool:
    """True when the numba loop serves (False: the numpy form)."""
    return _loop() is not None


def prepare(xt: np.ndarray) -> None:
    """Compile the loop now for the argument types requests will pass with training array
    ``xt`` ((d, N), N ≥ 1), so that no request pays the ~0.5 s compile."""
    if xt.shape[1] == 0:
        return
    q = np.zeros((1, xt.shape[0]), dtype=xt.dtype)
    with warming():
        scaled_l1(q, xt, 0, 1.0, np.empty((1, 1), dtype=xt.dtype))


def _numpy_l1(q: np.ndarray, xt: np.ndarray, j0: int, scale: float, out: np.ndarray) -> None:
    """The same values from ufuncs: three passes over the tile per feature."""
    w = out.shape[1]
    scratch = np.empty_like(out)
    np.subtract(q[:, 0, None], xt[0, j0 : j0 + w], out=out)
    np.abs(out, out=out)
    for k in range(1, xt.shape[0]):
        np.subtract(q[:, k, None], xt[k, j0 : j0 + w], out=scratch)
        np.abs(scratch, out=scratch)
        out += scratch
    out *= scale


def scaled_l1(q: np.ndarray, xt: np.ndarray, j0: int, scale: float, out: np.ndarray) -> np.ndarray:
    """Scaled L1 distances between query rows and a run of training columns, in place.

    Parameters
    ----------
    q : (m, d) C-contiguous query rows.
    xt : (d, N) C-contiguous training rows, feature-major (one feature's values contiguous).
    j0 : first training column of the tile.
    scale : s, the factor applied to every distance (−γ for the laplacian's exponent).
    out : (m, w) C-contiguous buffer, overwritten with
        ``out[i, j] = s · Σ_k |q[i, k] − xt[k, j0 + j]|``, the L1 (cityblock) distance.

    Returns
    -------
    ``out``.
    """
    loop = _loop()
    if loop is not None:
        try:
            loop(q, xt, j0, scale, out)
            _count_compiles(loop)
            return out
        except Exception as exc:  # the first call of a dtype compiles; see _give_up
            _give_up(exc)
    _numpy_l1(q, xt, j0, scale, out)
    return out
