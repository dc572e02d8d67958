"""The model's pointer files (live.json, shadow.json): one way to read them and one way to
replace them together with their history record.

A pointer is ``{"version": N, ...}``. Replacing one writes and flushes a temp file first
(where a full disk shows), appends the history record (cut back on failure), renames the
pointer into place in the same step and flushes the folder: a reader sees the old pointer
and history or the new ones, never a mix.
"""

from __future__ import annotations

import contextlib
import json
import os
from pathlib import Path

from service.store.files import append_line, fsync_dir, read_regular, write_temp
from service.store.names import StoreError, Unwritable, os_reason


def read_pointer(path: Path, name: str, read_fault) -> dict | None:
    """The pointer at ``path`` of model ``name``, None when absent; StoreError when damaged.

    ``read_fault(exc, where)`` turns an OSError into the store's error for a read fault."""
    try:
        raw = read_regular(path)
    except FileNotFoundError:
        return None
    except OSError as exc:
        raise read_fault(exc, f"{name}: {path.name}") from None
    try:
        entry = json.loads(raw)
    except ValueError:
        raise StoreError(f"{name}: {path.name} is damaged (not valid JSON)") from None
    version = entry.get("version") if isinstance(entry, dict) else None
    if isinstance(version, bool) or not isinstance(version, int) or version < 1:
        raise StoreError(f"{name}: {path.name} is damaged (it names no valid version)")
    return entry


def replace_pointer(mdir: Path, file_name: str, name: str, entry: dict, record: dict) -> None:
    """Write ``entry`` as ``mdir/file_name`` and append ``record`` to the history: all or
    nothing (module notes); Unwritable naming the model when the store refuses the write."""
    path = mdir / file_name
    try:
        tmp = write_temp(path, (json.dumps(entry) + "\n").encode())
        try:
            append_line(mdir / "history.jsonl", json.dumps(record),
                        then=lambda: os.replace(tmp, path))
        except BaseException:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(tmp)
            raise
        fsync_dir(mdir)
    except OSError as exc:
        raise Unwritable(f"{name}: cannot write to the store ({os_reason(exc)}); {file_name} "
                         "and the history are unchanged") from None
