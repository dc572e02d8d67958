"""Publishing a new version: staged, checksummed, numbered under the model lock and moved
into ``versions/<N>`` by one rename, so a reader sees all of it or nothing."""

from __future__ import annotations

import fcntl
import json
import os
import shutil
import uuid
from collections.abc import Callable
from pathlib import Path

import numpy as np

from service.store.files import fsync_dir, settle, sha256_file, sweep_staging
from service.store.names import ARRAY_NAME_RE, SCHEMA, STAGING, StoreError, os_reason
from service.store.reading import StoreReader


class Publisher(StoreReader):
    """The store's write path for new versions."""


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
        files (the report) before the rename. A failed first publish of a model leaves no
        model folder behind.
        """
        mdir = self.model_dir(name)
        fresh = not os.path.lexists(mdir)
        try:
            return self._publish(name, manifest, arrays, extra_files)
        except BaseException as exc:
            if fresh:
                _forget_empty_model(mdir)
            if isinstance(exc, OSError):
                raise StoreError(f"{name}: cannot write to the store ({os_reason(exc)}); "
                                 "nothing was published") from None
            raise

    def _publish(self, name, manifest, arrays, extra_files) -> int:
        mdir = self.model_dir(name)
        staging = mdir / STAGING
        staging.mkdir(parents=True, exist_ok=True)
        (mdir / "versions").mkdir(exist_ok=True)
        work, claim = _claim_work_folder(staging)
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
                existing = self.version_numbers(name)
                version = (max(existing) if existing else 0) + 1
                manifest["version"] = version
                (work / "manifest.json").write_text(json.dumps(manifest, indent=2) + "\n")
                if extra_files is not None:
                    extra_files(work, version)
                settle(work)
                os.rename(work, mdir / "versions" / str(version))
                fsync_dir(mdir / "versions")
            return version
        finally:
            shutil.rmtree(work, ignore_errors=True)
            os.close(claim)


def _claim_work_folder(staging: Path) -> tuple[Path, int]:
    """Sweep the litter of dead publishers, then make and lock a fresh work folder.

    Both happen under a lock on the staging folder itself: a new folder is unlocked for an
    instant between its mkdir and its flock, and another publisher's sweep must not see it
    then (it would take the free lock for the litter of a dead publisher and delete it).
    Returns the folder and the descriptor whose lock marks its writer as alive.
    """
    guard = os.open(staging, os.O_RDONLY)
    try:
        fcntl.flock(guard, fcntl.LOCK_EX)
        sweep_staging(staging)
        work = staging / uuid.uuid4().hex
        work.mkdir()
        # held while writing: a sweeper that can take it knows the writer is gone
        claim = os.open(work, os.O_RDONLY)
        fcntl.flock(claim, fcntl.LOCK_EX)
    finally:
        os.close(guard)  # closing the descriptor releases its lock
    return work, claim


def _forget_empty_model(mdir: Path) -> None:
    """Remove the folder a failed first publish made, unless another publisher works there
    or a version appeared: each step is an rmdir, which refuses a folder that is not empty.

    Done under the staging folder's lock, so no publisher claims a work folder meanwhile (one
    that opened the lock before the removal fails with a one-line store error and can run
    again).
    """
    staging = mdir / STAGING
    try:
        guard = os.open(staging, os.O_RDONLY)
    except OSError:
        guard = None
    try:
        if guard is not None:
            fcntl.flock(guard, fcntl.LOCK_EX)
        for step in (staging.rmdir, (mdir / "versions").rmdir, (mdir / ".lock").unlink,
                     mdir.rmdir):
            try:
                step()
            except FileNotFoundError:
                continue
            except OSError:
                return  # someone else's work or a version: the folder stays
    finally:
        if guard is not None:
            os.close(guard)
