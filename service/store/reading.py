"""Reading the store: paths, the model lock, live.json, the history, manifests and the
checksummed arrays. Everything here is safe while writers work (they publish by rename).

Every read opens the file without blocking and checks that it is a regular file (a FIFO,
a socket or a symbolic link loop in the store is a refused version, never a hang or a
crash). Arrays are read into this process's memory, checksummed there and used from there:
what was verified is what is served, and a file changed in place later cannot reach (or
crash, as a truncated memory map would with SIGBUS) a process that loaded it.
"""

from __future__ import annotations

import contextlib
import errno
import fcntl
import json
import os
from collections.abc import Iterator
from pathlib import Path

import numpy as np

from service.store.arrays import read_array
from service.store.files import NotRegular, read_regular
from service.store.names import (
    ARRAY_NAME_RE,
    NAME_RE,
    READABLE_SCHEMAS,
    NotFound,
    StoreError,
    Unwritable,
    check_name,
    check_version,
    is_version_text,
    os_reason,
    store_root,
)
from service.store.pointers import read_pointer

#: Actions a history record may name; rollback's replay looks at release and rollback only
#: (the shadow records are written by :mod:`service.store.shadowing`).
HISTORY_ACTIONS = ("release", "rollback", "shadow", "shadow_off")


def read_fault(exc: OSError, what: str) -> StoreError:
    """The store error for a file ``what`` (e.g. "coat v2: manifest.json") that could not
    be read: its reason class, never its path."""
    if isinstance(exc, NotRegular):
        return StoreError(f"{what} is not a regular file", kind="not a regular file")
    if exc.errno == errno.ELOOP:
        return StoreError(f"{what} is a symbolic link loop", kind="symbolic link")
    return StoreError(f"{what} cannot be read ({os_reason(exc)})", kind="unreadable")


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
        try:
            (mdir / "versions").mkdir(parents=True, exist_ok=True)
            lock = open(mdir / ".lock", "a+")  # noqa: SIM115 (closed by the with below)
        except OSError as exc:
            raise Unwritable(f"{name}: the store cannot be written from here "
                             f"({os_reason(exc)}); nothing was changed") from None
        with lock:
            fcntl.flock(lock, fcntl.LOCK_EX)
            try:
                yield mdir
            finally:
                fcntl.flock(lock, fcntl.LOCK_UN)

    def _own_file(self, name: str, version: int, relative: str) -> Path:
        """``relative`` inside the version's folder, refused when a symlink on the way leads
        anywhere else: checksums prove content, not that the file belongs to the store."""
        path = self.version_dir(name, version) / relative
        try:
            expected = self.root.resolve() / name / "versions" / str(version) / relative
            elsewhere = os.path.lexists(path) and path.resolve() != expected
        except (OSError, RuntimeError):  # RuntimeError: Python 3.11's "Symlink loop"
            raise StoreError(f"{name} v{version}: {relative} is reached through a symbolic "
                             "link loop", kind="symbolic link") from None
        if elsewhere:
            raise StoreError(f"{name} v{version}: {relative} is a symbolic link to a file "
                             "elsewhere; a version holds its own files", kind="symbolic link")
        return path

    # -- reading -------------------------------------------------------------------------
    def models(self) -> list[str]:
        """Names of models that have at least one version (a folder a publisher is still
        filling, or one left without versions, is no model)."""
        try:
            names = os.listdir(self.root)
        except OSError:  # no store yet, or not one this account may list: nothing to serve
            return []
        return sorted(n for n in names
                      if NAME_RE.fullmatch(n) and self._version_names(self.root / n / "versions"))

    @staticmethod
    def _version_names(vdir: Path) -> list[str]:
        """Names in ``vdir`` that are versions; [] when it cannot be listed."""
        try:
            return [n for n in os.listdir(vdir) if is_version_text(n)]
        except OSError:
            return []

    def versions(self, name: str) -> list[int]:
        """Version numbers present, ascending (including broken ones: verify tells);
        NotFound when there is none: a folder without versions is no model."""
        found = self.version_numbers(name)
        if not found:
            raise NotFound(f"no model named {name!r}")
        return found

    def existing_version(self, name: str, version, check=None) -> int:
        """``version`` as a number when ``name`` has it (NotFound otherwise), after
        ``check(version)`` (e.g. verify), which may refuse it."""
        version = check_version(version)
        if version not in self.versions(name):
            raise NotFound(f"model {name!r} has no version {version}")
        if check is not None:
            check(version)
        return version

    def version_numbers(self, name: str) -> list[int]:
        """Version numbers present, ascending; [] when none (or no such folder)."""
        return sorted(int(n) for n in self._version_names(self.model_dir(name) / "versions"))

    def known(self, name: str) -> bool:
        """True when ``name`` is a valid model name with at least one version."""
        try:
            return bool(self.version_numbers(name))
        except StoreError:  # not a valid name
            return False

    def live(self, name: str) -> dict | None:
        """Contents of live.json, or None when nothing was released yet.

        A damaged pointer (not JSON, no positive integer version) is a :class:`StoreError`
        naming the model; ``kridge release`` writes a fresh one.
        """
        return read_pointer(self.model_dir(name) / "live.json", name, read_fault)

    def live_version(self, name: str) -> int | None:
        """The version live.json names, None when nothing is live; StoreError when damaged."""
        entry = self.live(name)
        return None if entry is None else entry["version"]

    def _history_lines(self, name: str) -> tuple[list[tuple[int, dict]], list[int]]:
        """(line number, record) of every readable history line, and the damaged lines."""
        try:
            text = read_regular(self.model_dir(name) / "history.jsonl").decode(errors="replace")
        except FileNotFoundError:
            return [], []
        except OSError as exc:
            raise read_fault(exc, f"{name}: history.jsonl") from None
        good, bad = [], []
        for number, line in enumerate(text.splitlines(), start=1):
            if not line.strip():
                continue
            try:
                rec = json.loads(line)
            except ValueError:
                rec = None
            version = rec.get("version") if isinstance(rec, dict) else None
            if (not isinstance(rec, dict) or rec.get("action") not in HISTORY_ACTIONS
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
            manifest = json.loads(read_regular(path))
        except FileNotFoundError:
            raise StoreError(f"{name} v{version}: manifest.json is missing (incomplete "
                             "version)", kind="missing file") from None
        except OSError as exc:
            raise read_fault(exc, f"{name} v{version}: manifest.json") from None
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

    def read_report(self, name: str, version: int) -> bytes | None:
        """The report's bytes (see :meth:`report_path`), None when the version has none."""
        if self.report_path(name, version) is None:
            return None
        try:
            return read_regular(self._own_file(name, version, "report.html"))
        except OSError as exc:
            raise read_fault(exc, f"{name} v{version}: report.html") from None

    def load_arrays(self, name: str, version: int, manifest: dict) -> dict[str, np.ndarray]:
        """Read every array into memory, verify its sha256 there and return it read-only
        (plain numeric .npy only; no pickle, ever)."""
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
            what = f"{name} v{version}: array {key!r}"
            path = self._own_file(name, version, f"arrays/{key}.npy")
            try:
                arr = read_array(path, what, meta.get("sha256"))
            except FileNotFoundError:
                raise StoreError(f"{what} is missing ({key}.npy)", kind="missing file") from None
            except OSError as exc:
                raise read_fault(exc, what) from None
            if list(arr.shape) != list(meta.get("shape", arr.shape)):
                raise StoreError(f"{what} has shape {arr.shape}")
            arrays[key] = arr
        return arrays
