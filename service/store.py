"""The model store on a local file system: versions, live pointer, release history.

Layout (fixed by the design notes)::

    <store>/<model>/versions/<N>/manifest.json
    <store>/<model>/versions/<N>/arrays/<name>.npy
    <store>/<model>/versions/<N>/report.html
    <store>/<model>/live.json
    <store>/<model>/history.jsonl

Writers take an exclusive ``flock`` on ``<model>/.lock`` only for the short steps that must
not interleave (choosing a version number and renaming into place; rewriting live.json and
appending to the history). Everything a reader can see appears by one ``rename``.
"""

from __future__ import annotations

import contextlib
import fcntl
import hashlib
import json
import os
import re
import shutil
import tempfile
import uuid
from collections.abc import Callable, Iterator
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from service.settings import DEFAULT_STORE

SCHEMA = 1
NAME_RE = re.compile(r"[a-z0-9][a-z0-9._-]{0,63}")
ARRAY_NAME_RE = re.compile(r"[A-Za-z0-9_]{1,64}")
STAGING = ".staging"


class StoreError(Exception):
    """A store operation that cannot be done; the message is meant for the user."""


class NotFound(StoreError):
    """A model or version that does not exist."""


def now_iso() -> str:
    """Current UTC time, ISO 8601 with seconds."""
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def store_root(path: str | os.PathLike | None = None) -> Path:
    """``path``, else env ``KRIDGE_STORE``, else ``./kridge-store``."""
    return Path(path or os.environ.get("KRIDGE_STORE") or DEFAULT_STORE)


def check_name(name: str) -> str:
    """Refuse model names that could leave the store or surprise a shell."""
    if not isinstance(name, str) or not NAME_RE.fullmatch(name) or name in (".", ".."):
        raise StoreError(
            f"invalid model name {name!r}: use 1-64 characters of a-z, 0-9, '.', '_', '-', "
            "starting with a letter or digit"
        )
    return name


def check_version(version) -> int:
    """A version is a positive integer (an integer string is accepted)."""
    text = str(version)
    if not text.isdigit() or int(text) < 1 or len(text) > 9:
        raise StoreError(f"invalid version {version!r}: versions are positive integers")
    return int(text)


def sha256_file(path: Path) -> str:
    """Hex sha256 of a file, read in 1 MiB chunks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _write_atomic(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` through a flushed temp file and a rename."""
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.")
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise
    _fsync_dir(path.parent)


class Store:
    """One store root holding any number of models."""

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
        """Contents of live.json, or None when nothing was released yet."""
        path = self.model_dir(name) / "live.json"
        try:
            return json.loads(path.read_text())
        except FileNotFoundError:
            return None
        except (OSError, ValueError) as exc:
            raise StoreError(f"{path} is unreadable: {exc}") from exc

    def live_version(self, name: str) -> int | None:
        entry = self.live(name)
        return None if entry is None else int(entry["version"])

    def history(self, name: str) -> list[dict]:
        """Every release and rollback, oldest first."""
        path = self.model_dir(name) / "history.jsonl"
        if not path.exists():
            return []
        return [json.loads(line) for line in path.read_text().splitlines() if line.strip()]

    def read_manifest(self, name: str, version: int) -> dict:
        """The manifest of one version, schema-checked (checksums are not read here)."""
        vdir = self.version_dir(name, version)
        if not vdir.is_dir():
            raise NotFound(f"model {name!r} has no version {version}")
        path = vdir / "manifest.json"
        try:
            manifest = json.loads(path.read_text())
        except FileNotFoundError as exc:
            raise StoreError(
                f"{name} v{version}: manifest.json is missing (incomplete version)"
            ) from exc
        except ValueError as exc:
            raise StoreError(f"{name} v{version}: manifest.json is not valid JSON") from exc
        if not isinstance(manifest, dict) or manifest.get("schema") != SCHEMA:
            found = manifest.get("schema") if isinstance(manifest, dict) else None
            raise StoreError(
                f"{name} v{version}: manifest schema {found!r} is not supported "
                f"(this kridge reads schema {SCHEMA})"
            )
        return manifest

    def load_arrays(self, name: str, version: int, manifest: dict) -> dict[str, np.ndarray]:
        """Verify every array's sha256, then memory-map it read-only (no pickle, ever)."""
        vdir = self.version_dir(name, version)
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
            path = vdir / "arrays" / f"{key}.npy"
            if not path.is_file():
                raise StoreError(f"{name} v{version}: array {key!r} is missing ({key}.npy)")
            digest = sha256_file(path)
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
                ) from exc
            if arr.dtype.kind not in "fiu" or arr.dtype.hasobject:
                raise StoreError(f"{name} v{version}: array {key!r} has dtype {arr.dtype}")
            if list(arr.shape) != list(meta.get("shape", arr.shape)):
                raise StoreError(f"{name} v{version}: array {key!r} has shape {arr.shape}")
            arrays[key] = arr
        return arrays

    # -- writing -------------------------------------------------------------------------
    def publish(
        self,
        name: str,
        manifest: dict,
        arrays: dict[str, np.ndarray],
        extra_files: Callable[[Path, int], None] | None = None,
    ) -> int:
        """Write a new version atomically and return its number.

        The arrays and checksums are written into ``<model>/.staging/<id>`` first; then,
        under the model lock, the next free number is chosen, stamped into the manifest and
        the directory renamed into ``versions/<N>``. ``extra_files(dir, version)`` may add
        files (the report) before the rename.
        """
        mdir = self.model_dir(name)
        staging = mdir / STAGING
        staging.mkdir(parents=True, exist_ok=True)
        (mdir / "versions").mkdir(exist_ok=True)
        work = staging / uuid.uuid4().hex
        try:
            (work / "arrays").mkdir(parents=True)
            listed = {}
            for key, arr in arrays.items():
                if not ARRAY_NAME_RE.fullmatch(key):
                    raise StoreError(f"invalid array name {key!r}")
                arr = np.asarray(arr)
                if not (arr.flags.c_contiguous or arr.flags.f_contiguous):
                    arr = np.ascontiguousarray(arr)  # .npy holds either order, not a view
                if arr.dtype.hasobject:
                    raise StoreError(f"array {key!r} is an object array; bundles hold numbers")
                path = work / "arrays" / f"{key}.npy"
                with open(path, "wb") as fh:
                    np.save(fh, arr, allow_pickle=False)
                    fh.flush()
                    os.fsync(fh.fileno())
                listed[key] = {
                    "sha256": sha256_file(path),
                    "shape": list(arr.shape),
                    "dtype": arr.dtype.str,
                }
            manifest = dict(manifest, schema=SCHEMA, model=name, arrays=listed)
            with self._locked(name):
                existing = self.versions(name)
                version = (max(existing) if existing else 0) + 1
                manifest["version"] = version
                (work / "manifest.json").write_text(json.dumps(manifest, indent=2) + "\n")
                if extra_files is not None:
                    extra_files(work, version)
                for path in work.rglob("*"):
                    if path.is_file():
                        with open(path, "rb") as fh:
                            os.fsync(fh.fileno())
                _fsync_dir(work)
                os.rename(work, mdir / "versions" / str(version))
                _fsync_dir(mdir / "versions")
            return version
        finally:
            shutil.rmtree(work, ignore_errors=True)

    def _set_live(self, mdir: Path, name: str, version: int, action: str, previous) -> dict:
        entry = {"version": version, "since": now_iso(), "previous": previous}
        _write_atomic(mdir / "live.json", (json.dumps(entry) + "\n").encode())
        record = {"time": entry["since"], "action": action, "version": version,
                  "previous": previous}
        with open(mdir / "history.jsonl", "a") as fh:
            fh.write(json.dumps(record) + "\n")
            fh.flush()
            os.fsync(fh.fileno())
        return record

    def release(self, name: str, version: int, check: Callable[[int], None] | None = None) -> dict:
        """Make ``version`` live. ``check(version)`` may refuse it first (e.g. verify)."""
        version = check_version(version)
        if version not in self.versions(name):
            raise NotFound(f"model {name!r} has no version {version}")
        if check is not None:
            check(version)
        with self._locked(name) as mdir:
            return self._set_live(mdir, name, version, "release", self.live_version(name))

    def live_stack(self, name: str) -> list[int]:
        """Versions that were live, oldest first, with rolled-back ones popped off.

        Replaying the history this way makes repeated rollbacks walk further back.
        """
        stack: list[int] = []
        for rec in self.history(name):
            if rec["action"] == "release":
                if not stack or stack[-1] != rec["version"]:
                    stack.append(rec["version"])
            elif rec["action"] == "rollback" and stack:
                stack.pop()
        return stack

    def rollback(self, name: str, check: Callable[[int], None] | None = None) -> dict:
        """Make the previously live version live again (``check`` may refuse it first)."""
        self.versions(name)  # NotFound for an unknown model
        with self._locked(name) as mdir:
            stack = self.live_stack(name)
            if len(stack) < 2:
                current = stack[-1] if stack else None
                what = f"version {current} is the first one released" if current else (
                    "nothing was released yet")
                raise StoreError(f"cannot roll back {name}: {what}; nothing earlier to go back to")
            if check is not None:
                check(stack[-2])
            return self._set_live(mdir, name, stack[-2], "rollback", stack[-1])
