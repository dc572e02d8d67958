"""Crash-safe file steps the store is built from: checksums, flushed temp files, an
all-or-nothing append, the sweep of staging folders left by dead publishers, and reads that
never block on what is not a regular file.

File modes: every file the store writes is created with :data:`FILE_MODE` less the umask
(folders: 0o777 less the umask, mkdir's default), so the account that serves can read
what another account released.
"""

from __future__ import annotations

import contextlib
import fcntl
import hashlib
import os
import secrets
import shutil
import stat
from collections.abc import Callable
from pathlib import Path

#: Mode of every file the store creates, before the umask: readable by all, written by its
#: owner (mkstemp's 0o600 would hide live.json from a service running as another account).
FILE_MODE = 0o644
#: The same for folders: listable and traversable by all.
DIR_MODE = 0o755


class NotRegular(OSError):
    """A path that should hold a regular file holds something else (FIFO, socket, device,
    folder): reading it could block or mean nothing."""


def open_regular(path: Path) -> int:
    """A read-only descriptor of ``path``, which must be a regular file.

    Opened with O_NONBLOCK, so a FIFO in its place answers at once instead of waiting for a
    writer; then checked with fstat (the very file opened, not a name looked up again).
    Raises FileNotFoundError, :class:`NotRegular`, or the OSError of the open (ELOOP for a
    symbolic link loop).
    """
    fd = os.open(path, os.O_RDONLY | os.O_NONBLOCK | os.O_CLOEXEC)
    try:
        mode = os.fstat(fd).st_mode
        if not stat.S_ISREG(mode):
            raise NotRegular(f"not a regular file (mode {stat.filemode(mode)})")
        os.set_blocking(fd, True)
    except BaseException:
        os.close(fd)
        raise
    return fd


def read_regular(path: Path) -> bytes:
    """The whole content of the regular file ``path`` (:func:`open_regular`)."""
    with os.fdopen(open_regular(path), "rb") as fh:
        return fh.read()


def sha256_file(path: Path) -> str:
    """Hex sha256 of a file, read in 1 MiB chunks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def settle(folder: Path) -> None:
    """Flush every file and folder under ``folder`` (and itself) to disk, with modes cut to
    :data:`FILE_MODE` / :data:`DIR_MODE` (never widened: the umask still counts), whoever
    wrote them (the report comes from the trainer)."""
    for path in [*folder.rglob("*"), folder]:
        st = path.lstat()
        if stat.S_ISREG(st.st_mode):
            with open(path, "rb") as fh:
                os.fchmod(fh.fileno(), stat.S_IMODE(st.st_mode) & FILE_MODE)
                os.fsync(fh.fileno())
        elif stat.S_ISDIR(st.st_mode):
            os.chmod(path, stat.S_IMODE(st.st_mode) & DIR_MODE)
            fsync_dir(path)


def fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def write_temp(path: Path, data: bytes) -> str:
    """Write and flush ``data`` to a temp file beside ``path``; returns the temp's name.

    The file gets :data:`FILE_MODE` less the umask, like every other file of the store.
    """
    tmp = str(path.parent / f".{path.name}.{secrets.token_hex(8)}")
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_CLOEXEC, FILE_MODE)
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
    fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_APPEND, FILE_MODE)
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

