"""Reading the store: paths, the model lock, live.json, the history, manifests and the
checksummed arrays. Everything here is safe while writers work (they publish by rename)."""

from __future__ import annotations

import contextlib
import fcntl
import json
import os
from collections.abc import Iterator
from pathlib import Path

import numpy as np

from service.store.files import sha256_file
from service.store.names import (
    ARRAY_NAME_RE,
    NAME_RE,
    READABLE_SCHEMAS,
    NotFound,
    StoreError,
    check_name,
    check_version,
    os_reason,
    store_root,
)


class StoreReader:
    """One store root holding any number of models: everything that reads it."""

    def __init__(self, root: str | os.PathLike | None = None):
        self.root = store_root(root)

    # -- paths ---------------------------------------------------------------------------
    def model_dir(self, name: str) -> Path:
        return self.root / check_name(name)

    def version_dir(self, name: str, version: int) -> Path:
        return self.model_dir(name) / "versions" / str(check_version(version))

    @contextlib.contextmanager
    def _locked(self, name: str) -> Iterator[Path]:
        mdir = self.model_dir(name)
        (mdir / "versions").mkdir(parents=True, exist_ok=True)
        with open(mdir / ".lock", "a+") as lock:
            fcntl.flock(lock, fcntl.LOCK_EX)
            try:
                yield mdir
            finally:
                fcntl.flock(lock, fcntl.LOCK_UN)

    def _own_file(self, name: str, version: int, relative: str) -> Path:
        """``relative`` inside the version's folder, refused when a symlink on the way leads
        anywhere else: checksums prove content, not that the file belongs to the store."""
        path = self.version_dir(name, version) / relative
        expected = self.root.resolve() / name / "versions" / str(version) / relative
        if os.path.lexists(path) and path.resolve() != expected:
            raise StoreError(f"{name} v{version}: {relative} is a symbolic link to a file "
                             "elsewhere; a version holds its own files")
        return path

    # -- reading -------------------------------------------------------------------------
    def models(self) -> list[str]:
        """Names of models that have at least one version directory."""
        if not self.root.is_dir():
            return []
        return sorted(
            p.name
            for p in self.root.iterdir()
            if p.is_dir() and NAME_RE.fullmatch(p.name) and (p / "versions").is_dir()
        )

    def versions(self, name: str) -> list[int]:
        """Version numbers present, ascending (including broken ones: verify tells)."""
        vdir = self.model_dir(name) / "versions"
        if not vdir.is_dir():
            raise NotFound(f"no model named {name!r} in store {self.root}")
        return sorted(int(p.name) for p in vdir.iterdir() if p.name.isdigit())

    def live(self, name: str) -> dict | None:
        """Contents of live.json, or None when nothing was released yet.

        A damaged pointer (not JSON, no positive integer version) is a :class:`StoreError`
        naming the model; ``kridge release`` writes a fresh one.
        """
        path = self.model_dir(name) / "live.json"
        try:
            raw = path.read_bytes()
        except FileNotFoundError:
            return None
        except OSError as exc:
            raise StoreError(f"{name}: live.json cannot be read ({os_reason(exc)})") from None
        try:
            entry = json.loads(raw)
        except ValueError:
            raise StoreError(f"{name}: live.json is damaged (not valid JSON)") from None
        version = entry.get("version") if isinstance(entry, dict) else None
        if isinstance(version, bool) or not isinstance(version, int) or version < 1:
            raise StoreError(f"{name}: live.json is damaged (it names no valid version)")
        return entry

    def live_version(self, name: str) -> int | None:
        """The version live.json names, None when nothing is live; StoreError when damaged."""
        entry = self.live(name)
        return None if entry is None else entry["version"]

    def _history_lines(self, name: str) -> tuple[list[tuple[int, dict]], list[int]]:
        """(line number, record) of every readable history line, and the damaged lines."""
        path = self.model_dir(name) / "history.jsonl"
        try:
            text = path.read_text(errors="replace")
        except FileNotFoundError:
            return [], []
        except OSError as exc:
            raise StoreError(f"{name}: history.jsonl cannot be read ({os_reason(exc)})") from None
        good, bad = [], []
        for number, line in enumerate(text.splitlines(), start=1):
            if not line.strip():
                continue
            try:
                rec = json.loads(line)
            except ValueError:
                rec = None
            version = rec.get("version") if isinstance(rec, dict) else None
            if (not isinstance(rec, dict) or rec.get("action") not in ("release", "rollback")
                    or isinstance(version, bool) or not isinstance(version, int)):
                bad.append(number)
            else:
                good.append((number, rec))
        return good, bad

    def readable_history(self, name: str) -> tuple[list[dict], list[int]]:
        """Every readable record, oldest first, and the numbers of damaged lines."""
        good, bad = self._history_lines(name)
        return [rec for _, rec in good], bad

    def history(self, name: str) -> list[dict]:
        """Every release and rollback, oldest first; StoreError naming a damaged line."""
        good, bad = self._history_lines(name)
        if bad:
            raise StoreError(f"{name}: history.jsonl line {bad[0]} is damaged")
        return [rec for _, rec in good]

    def read_manifest(self, name: str, version: int) -> dict:
        """The manifest of one version, schema-checked (checksums are not read here)."""
        vdir = self.version_dir(name, version)
        if not vdir.is_dir():
            raise NotFound(f"model {name!r} has no version {version}")
        path = self._own_file(name, version, "manifest.json")
        try:
            manifest = json.loads(path.read_bytes())
        except FileNotFoundError:
            raise StoreError(
                f"{name} v{version}: manifest.json is missing (incomplete version)"
            ) from None
        except OSError as exc:
            raise StoreError(f"{name} v{version}: manifest.json cannot be read "
                             f"({os_reason(exc)})") from None
        except ValueError:
            raise StoreError(f"{name} v{version}: manifest.json is not valid JSON") from None
        if not isinstance(manifest, dict) or manifest.get("schema") not in READABLE_SCHEMAS:
            found = manifest.get("schema") if isinstance(manifest, dict) else None
            raise StoreError(
                f"{name} v{version}: manifest schema {found!r} is not supported "
                f"(this kridge reads schemas {', '.join(map(str, READABLE_SCHEMAS))})"
            )
        return manifest

    def report_path(self, name: str, version: int) -> Path | None:
        """The version's training report (the layout's one report file), None when it has
        none; name and version are validated, so the path stays inside the store."""
        if not self.version_dir(name, version).is_dir():
            raise NotFound(f"model {name!r} has no version {version}")
        path = self._own_file(name, version, "report.html")
        return path if path.is_file() else None

    def load_arrays(self, name: str, version: int, manifest: dict) -> dict[str, np.ndarray]:
        """Verify every array's sha256, then memory-map it read-only (no pickle, ever)."""
        arrays = {}
        listed = manifest.get("arrays")
        if not isinstance(listed, dict) or not listed:
            raise StoreError(f"{name} v{version}: manifest lists no arrays")
        for key, meta in listed.items():
            # the manifest is data from disk: its names must not lead out of arrays/
            if not isinstance(key, str) or not ARRAY_NAME_RE.fullmatch(key):
                raise StoreError(f"{name} v{version}: manifest lists an invalid array name {key!r}")
            if not isinstance(meta, dict):
                raise StoreError(f"{name} v{version}: manifest entry of array {key!r} is malformed")
            path = self._own_file(name, version, f"arrays/{key}.npy")
            if not path.is_file():
                raise StoreError(f"{name} v{version}: array {key!r} is missing ({key}.npy)")
            try:
                digest = sha256_file(path)
            except OSError as exc:
                raise StoreError(f"{name} v{version}: array {key!r} cannot be read "
                                 f"({os_reason(exc)})") from None
            if digest != meta.get("sha256"):
                raise StoreError(
                    f"{name} v{version}: array {key!r} fails its checksum "
                    f"(sha256 {digest[:12]}… expected {str(meta.get('sha256'))[:12]}…)"
                )
            try:
                arr = np.load(path, mmap_mode="r", allow_pickle=False)
            except ValueError as exc:
                raise StoreError(
                    f"{name} v{version}: array {key!r} is not a plain numeric array ({exc})"
                ) from None
            except OSError as exc:
                raise StoreError(f"{name} v{version}: array {key!r} cannot be read "
                                 f"({os_reason(exc)})") from None
            if arr.dtype.kind not in "fiu" or arr.dtype.hasobject:
                raise StoreError(f"{name} v{version}: array {key!r} has dtype {arr.dtype}")
            if list(arr.shape) != list(meta.get("shape", arr.shape)):
                raise StoreError(f"{name} v{version}: array {key!r} has shape {arr.shape}")
            arrays[key] = arr
        return arrays
