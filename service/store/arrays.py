"""One array of a version, read into memory and checked there: size, sha256, .npy header.

The file is read once through a descriptor (:func:`service.store.files.open_regular`); the
checksum is taken over those bytes and the array is a read-only view of the same buffer. So
the bytes served are the bytes verified, and nothing the process holds is backed by the file.
"""

from __future__ import annotations

import hashlib
import io
import os
from pathlib import Path

import numpy as np
from numpy.lib import format as npy

from service.store.files import open_regular
from service.store.names import StoreError

#: The .npy header (magic, length, dict) fits in this many leading bytes; numpy refuses
#: headers over 10,000 bytes by default (``max_header_size``), so this bounds the parse.
HEADER_BYTES = 1 << 14


def read_array(path: Path, what: str, sha256: object) -> np.ndarray:
    """The array stored at ``path`` when its bytes hash to ``sha256`` (hex).

    ``what`` names the array in messages (model, version, key). Raises OSError from the
    open (FileNotFoundError, not a regular file, a loop) and :class:`StoreError` for a short
    read, a checksum mismatch or anything but a plain numeric array.
    """
    with os.fdopen(open_regular(path), "rb", buffering=0) as fh:
        size = os.fstat(fh.fileno()).st_size
        buf = np.empty(size, dtype=np.uint8)  # numpy's allocation: aligned for any dtype
        view, got = memoryview(buf), 0
        while got < size:
            step = fh.readinto(view[got:])
            if not step:
                raise StoreError(f"{what} got shorter while it was read", kind="damaged")
            got += step
    digest = hashlib.sha256(view).hexdigest()
    if digest != sha256:
        raise StoreError(f"{what} fails its checksum (sha256 {digest[:12]}… expected "
                         f"{str(sha256)[:12]}…)", kind="checksum")
    return _npy_view(buf, what)


def _npy_view(buf: np.ndarray, what: str) -> np.ndarray:
    """The array a .npy file's bytes ``buf`` hold, as a read-only view of ``buf``."""
    head = io.BytesIO(buf[:HEADER_BYTES].tobytes())
    try:
        version = npy.read_magic(head)
        if version == (1, 0):
            shape, fortran, dtype = npy.read_array_header_1_0(head)
        elif version == (2, 0):
            shape, fortran, dtype = npy.read_array_header_2_0(head)
        else:
            raise ValueError(f".npy format {version} is not read here")
    except ValueError as exc:
        raise StoreError(f"{what} is not a plain numeric array ({exc})") from None
    if dtype.hasobject or dtype.kind not in "fiu":
        raise StoreError(f"{what} has dtype {dtype}; bundles hold plain numbers")
    offset = head.tell()
    count = int(np.prod(shape, dtype=np.int64))
    if buf.size != offset + count * dtype.itemsize:
        raise StoreError(f"{what} holds {buf.size - offset} bytes of data; its header says "
                         f"{count * dtype.itemsize}", kind="damaged")
    arr = buf[offset:].view(dtype).reshape(shape, order="F" if fortran else "C")
    arr.flags.writeable = False
    return arr
