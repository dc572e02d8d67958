"""Comparisons kept on record beside a version: ``versions/<N>/comparisons/<stamp>.json``.

A comparison (``kridge compare --keep-result``) is written after the version was published,
so it is no part of the version's checksummed bundle: the manifest does not list it, and
loading and ``verify`` never read it (a damaged or removed comparison cannot stop a version
from being served). Each file appears by one rename of a flushed temp file, so a reader sees
a whole comparison or none; the folder itself is made on first use.
"""

from __future__ import annotations

import contextlib
import json
import os
import secrets
from datetime import datetime, timezone

from service.store.files import DIR_MODE, fsync_dir, read_regular, write_temp
from service.store.names import NotFound, StoreError, Unwritable, os_reason
from service.store.reading import StoreReader

#: The folder inside a version's folder that holds its comparisons.
FOLDER = "comparisons"


class Comparisons(StoreReader):
    """Keep and list the comparisons on record for a version."""

    def keep_comparison(self, name: str, version: int, document: dict) -> str:
        """Store ``document`` (JSON-able) beside version ``version``; returns the file name."""
        vdir = self.version_dir(name, version)
        if not vdir.is_dir():
            raise NotFound(f"model {name!r} has no version {version}")
        folder = vdir / FOLDER
        stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%S")
        target = folder / f"{stamp}-{secrets.token_hex(3)}.json"
        data = (json.dumps(document, indent=2, allow_nan=False) + "\n").encode()
        try:
            folder.mkdir(mode=DIR_MODE, exist_ok=True)
            tmp = write_temp(target, data)
            try:
                os.replace(tmp, target)
            except BaseException:
                with contextlib.suppress(FileNotFoundError):
                    os.unlink(tmp)
                raise
            fsync_dir(folder)
            fsync_dir(vdir)
        except OSError as exc:
            raise Unwritable(f"{name} v{version}: cannot keep the comparison "
                             f"({os_reason(exc)}); nothing was written") from None
        return target.name

    def comparisons(self, name: str, version: int) -> list[dict]:
        """The comparisons on record for a version, oldest first; an unreadable file is
        listed as ``{"file": ..., "fault": ...}`` instead of failing the listing."""
        folder = self.version_dir(name, version) / FOLDER
        try:
            names = sorted(n for n in os.listdir(folder)
                           if n.endswith(".json") and not n.startswith("."))
        except OSError:
            return []
        out = []
        for file in names:
            try:
                doc = json.loads(read_regular(folder / file))
                if not isinstance(doc, dict):
                    raise ValueError("not an object")
                out.append(dict(doc, file=file))
            except (OSError, ValueError) as exc:
                out.append({"file": file, "fault": str(exc) if isinstance(exc, ValueError)
                            else os_reason(exc)})
        return out


__all__ = ["FOLDER", "Comparisons", "StoreError"]
