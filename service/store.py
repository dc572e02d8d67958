"""The model store on a local file system: versions, live pointer, release history.

Layout (fixed; other tools and scripts depend on it)::

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


class Conflict(StoreError):
    """A valid request that the store's present state does not allow (nothing to roll back
    to, a damaged history): the message says what is unknown and how to go on."""


def _reason(exc: OSError) -> str:
    """An OS error without the file name: messages may reach HTTP answers and logs, which
    must not show where the store lives."""
    return exc.strerror or type(exc).__name__


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


def _write_temp(path: Path, data: bytes) -> str:
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


def _append_line(path: Path, line: str, then: Callable[[], None] | None = None) -> None:
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


def _sweep_staging(staging: Path) -> None:
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
            raise StoreError(f"{name}: live.json cannot be read ({_reason(exc)})") from None
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
            raise StoreError(f"{name}: history.jsonl cannot be read ({_reason(exc)})") from None
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
                             f"({_reason(exc)})") from None
        except ValueError:
            raise StoreError(f"{name} v{version}: manifest.json is not valid JSON") from None
        if not isinstance(manifest, dict) or manifest.get("schema") != SCHEMA:
            found = manifest.get("schema") if isinstance(manifest, dict) else None
            raise StoreError(
                f"{name} v{version}: manifest schema {found!r} is not supported "
                f"(this kridge reads schema {SCHEMA})"
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
                                 f"({_reason(exc)})") from None
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
                                 f"({_reason(exc)})") from None
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
        try:
            return self._publish(name, manifest, arrays, extra_files)
        except OSError as exc:
            raise StoreError(f"{name}: cannot write to the store ({_reason(exc)}); nothing "
                             "was published") from None

    def _publish(self, name, manifest, arrays, extra_files) -> int:
        mdir = self.model_dir(name)
        staging = mdir / STAGING
        staging.mkdir(parents=True, exist_ok=True)
        (mdir / "versions").mkdir(exist_ok=True)
        _sweep_staging(staging)
        work = staging / uuid.uuid4().hex
        work.mkdir()
        # held while writing: a sweeper that can take it knows the writer is gone
        claim = os.open(work, os.O_RDONLY)
        fcntl.flock(claim, fcntl.LOCK_EX)
        try:
            (work / "arrays").mkdir()
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
            os.close(claim)

    def _set_live(self, mdir: Path, name: str, version: int, action: str, previous,
                  repaired: str | None = None, restart: bool = False) -> dict:
        """Append the history record and swap live.json in: all or nothing.

        The new pointer is written and flushed to a temp file first (where a full disk shows),
        then the record appended (cut back on failure) and the pointer renamed into place.
        """
        entry = {"version": version, "since": now_iso(), "previous": previous}
        record = {"time": entry["since"], "action": action, "version": version,
                  "previous": previous}
        if repaired:
            record["repaired"] = repaired
        if restart:  # rollback replays the history from here on (earlier lines are damaged)
            record["restart"] = True
        live = mdir / "live.json"
        try:
            tmp = _write_temp(live, (json.dumps(entry) + "\n").encode())
            try:
                _append_line(mdir / "history.jsonl", json.dumps(record),
                             then=lambda: os.replace(tmp, live))
            except BaseException:
                with contextlib.suppress(FileNotFoundError):
                    os.unlink(tmp)
                raise
            _fsync_dir(mdir)
        except OSError as exc:
            raise StoreError(f"{name}: cannot write to the store ({_reason(exc)}); live.json "
                             "and the history are unchanged") from None
        return record

    def release(self, name: str, version: int, check: Callable[[int], None] | None = None) -> dict:
        """Make ``version`` live. ``check(version)`` may refuse it first (e.g. verify).

        Release is also the repair: a damaged or lost live.json is replaced by a fresh
        pointer, and a damaged history gets a record from which rollback starts anew; the
        history record says what was repaired.
        """
        version = check_version(version)
        if version not in self.versions(name):
            raise NotFound(f"model {name!r} has no version {version}")
        if check is not None:
            check(version)
        with self._locked(name) as mdir:
            notes, restart = [], False
            try:
                previous = self.live_version(name)
            except StoreError as exc:
                previous = None
                notes.append(f"{str(exc).split(': ', 1)[-1]}; replaced")
            try:
                stack = self.live_stack(name)
            except StoreError as exc:
                restart = True
                notes.append(f"{str(exc).split(': ', 1)[-1]}; rollback starts from this record")
            else:
                if previous is None and not notes and stack:
                    notes.append(f"live.json was missing although version {stack[-1]} was "
                                 "live; replaced")
                elif previous is not None and stack and previous != stack[-1]:
                    notes.append(f"live.json named version {previous} but the history last "
                                 f"made version {stack[-1]} live; both agree again")
            return self._set_live(mdir, name, version, "release", previous,
                                  repaired="; ".join(notes) or None, restart=restart)

    def live_stack(self, name: str) -> list[int]:
        """Versions that were live, oldest first, with rolled-back ones popped off.

        Replaying the history this way makes repeated rollbacks walk further back. The replay
        starts at the last record marked ``restart`` (a release that repaired a damaged
        history); a damaged line after it is a StoreError.
        """
        good, bad = self._history_lines(name)
        start = max((n for n, rec in good if rec.get("restart")), default=0)
        damaged = [n for n in bad if n > start]
        if damaged:
            raise StoreError(f"{name}: history.jsonl line {damaged[0]} is damaged")
        stack: list[int] = []
        for n, rec in good:
            if n < start:
                continue
            if rec["action"] == "release":
                if not stack or stack[-1] != rec["version"]:
                    stack.append(rec["version"])
            elif rec["action"] == "rollback" and stack:
                stack.pop()
        return stack

    def rollback(self, name: str, check: Callable[[int], None] | None = None) -> dict:
        """Make the previously live version live again (``check`` may refuse it first).

        :class:`Conflict` when there is nothing earlier, or when a damaged live.json or
        history leaves unknown what is live now or what was live before.
        """
        self.versions(name)  # NotFound for an unknown model
        fix = f"make the version you want live with `kridge release {name} VERSION`"
        with self._locked(name) as mdir:
            try:
                stack = self.live_stack(name)
            except StoreError as exc:
                raise Conflict(
                    f"cannot roll back {name}: {str(exc).split(': ', 1)[-1]}, so the versions "
                    f"live before are unknown; {fix} (this also repairs the history)") from None
            try:
                live = self.live_version(name)
            except StoreError as exc:
                last = f" (the history's last is version {stack[-1]})" if stack else ""
                raise Conflict(
                    f"cannot roll back {name}: {str(exc).split(': ', 1)[-1]}, so the version "
                    f"live now is unknown{last}; {fix} (this also replaces live.json)"
                ) from None
            if live is None and stack:
                raise Conflict(
                    f"cannot roll back {name}: live.json is missing although the history "
                    f"shows version {stack[-1]} live; {fix}")
            if stack and live != stack[-1]:
                raise Conflict(
                    f"cannot roll back {name}: live.json names version {live} but the history "
                    f"last made version {stack[-1]} live (changed by another tool?); {fix}")
            if len(stack) < 2:
                current = stack[-1] if stack else None
                what = f"version {current} is the first one released" if current else (
                    "nothing was released yet")
                raise Conflict(f"cannot roll back {name}: {what}; nothing earlier to go back to")
            if check is not None:
                check(stack[-2])
            return self._set_live(mdir, name, stack[-2], "rollback", stack[-1])
