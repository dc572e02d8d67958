"""Crash-safe file steps the store is built from: checksums, flushed temp files, an
all-or-nothing append, and the sweep of staging folders left by dead publishers."""

from __future__ import annotations

import contextlib
import fcntl
import hashlib
import os
import shutil
import tempfile
from collections.abc import Callable
from pathlib import Path


def sha256_file(path: Path) -> str:
    """Hex sha256 of a file, read in 1 MiB chunks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def write_temp(path: Path, data: bytes) -> str:
    """Write and flush ``data`` to a temp file beside ``path``; returns the temp's name."""
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.")
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise
    return tmp


def append_line(path: Path, line: str, then: Callable[[], None] | None = None) -> None:
    """Append one line, run ``then`` right after the write, then flush to disk.

    On a failed write the file is cut back to its old length. ``then`` (the live.json swap)
    follows the write with nothing slow between them, so a process killed in between is a
    window of two system calls; what kill -9 leaves in the page cache stays in the file.
    """
    fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_APPEND, 0o644)
    try:
        size = os.lseek(fd, 0, os.SEEK_END)
        data = line.encode() + b"\n"
        if size and os.pread(fd, 1, size - 1) != b"\n":
            data = b"\n" + data  # a torn last line (a writer killed mid-append)
        try:
            view = memoryview(data)
            while view:
                view = view[os.write(fd, view):]
            if then is not None:
                then()
        except BaseException:
            with contextlib.suppress(OSError):
                os.ftruncate(fd, size)
            raise
        os.fsync(fd)
    finally:
        os.close(fd)


def sweep_staging(staging: Path) -> None:
    """Remove staging folders left by publishers that died (kill -9, power loss): each live
    publisher holds a lock on its folder, so a folder whose lock can be taken is litter."""
    for entry in staging.iterdir():
        try:
            fd = os.open(entry, os.O_RDONLY)
        except OSError:
            continue
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            continue  # a publisher at work
        else:
            shutil.rmtree(entry, ignore_errors=True)
        finally:
            os.close(fd)

