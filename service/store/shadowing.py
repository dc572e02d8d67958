"""The shadow pointer: a version scored beside the live one on real traffic, never answering.

``<store>/<model>/shadow.json`` (``{"version": N, "since": ..., "live": L}``) sits next to
live.json and is written the same way: flushed to a temp file, the history record appended,
then renamed into place, all under the model's lock. Ending the shadow removes the file and
appends a record too. History records: ``{"action": "shadow", "version": N, "previous": P}``
(P the version shadowed before, or null) and ``{"action": "shadow_off", "version": N,
"previous": null, "reason": "ended" | "released"}``; rollback's replay ignores both.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

from service.store.files import append_line, fsync_dir
from service.store.names import (
    StoreError,
    Unwritable,
    now_iso,
    os_reason,
)
from service.store.pointers import read_pointer, replace_pointer
from service.store.reading import StoreReader, read_fault

#: File name of the shadow pointer inside a model's folder.
SHADOW_FILE = "shadow.json"


class Shadowing(StoreReader):
    """Name, read and end a model's shadow version."""

    def shadow(self, name: str) -> dict | None:
        """Contents of shadow.json, None when no shadow is named; StoreError when damaged."""
        return read_pointer(self.model_dir(name) / SHADOW_FILE, name, read_fault)

    def shadow_version(self, name: str) -> int | None:
        entry = self.shadow(name)
        return None if entry is None else entry["version"]

    def set_shadow(self, name: str, version: int, check=None) -> dict:
        """Name ``version`` the shadow of ``name`` (``check(version)`` may refuse it first);
        returns the history record."""
        version = self.existing_version(name, version, check)
        with self._locked(name) as mdir:
            try:
                previous = self.shadow_version(name)
            except StoreError:
                previous = None  # a damaged pointer is replaced
            now = now_iso()
            entry = {"version": version, "since": now, "live": self.live_version(name)}
            record = {"time": now, "action": "shadow", "version": version,
                      "previous": previous}
            replace_pointer(mdir, SHADOW_FILE, name, entry, record)
        return record

    def end_shadow(self, name: str, only: int | None = None,
                   reason: str = "ended") -> dict | None:
        """Remove the shadow pointer (when ``only`` is given, only if it names that version);
        returns the history record, or None when there was nothing to end."""
        self.versions(name)  # NotFound for an unknown model
        with self._locked(name) as mdir:
            try:
                current = self.shadow_version(name)
            except StoreError:
                current = None if only is not None else 0  # 0: a damaged pointer, removed
            if current is None or (only is not None and current != only):
                return None
            record = {"time": now_iso(), "action": "shadow_off", "version": current or 0,
                      "previous": None, "reason": reason}
            path: Path = mdir / SHADOW_FILE
            try:
                append_line(mdir / "history.jsonl", json.dumps(record),
                            then=lambda: os.unlink(path))
                fsync_dir(mdir)
            except OSError as exc:
                raise Unwritable(f"{name}: cannot write to the store ({os_reason(exc)}); "
                                 f"{SHADOW_FILE} is unchanged") from None
        return record
