"""The model store on a local file system: versions, live pointer, release history.

Layout (fixed; other tools and scripts depend on it)::

    <store>/<model>/versions/<N>/manifest.json
    <store>/<model>/versions/<N>/arrays/<name>.npy
    <store>/<model>/versions/<N>/report.html
    <store>/<model>/versions/<N>/comparisons/<stamp>.json   (kept comparisons, unchecksummed)
    <store>/<model>/live.json
    <store>/<model>/history.jsonl
    <store>/<model>/shadow.json        (only while a shadow version is named)

Writers take an exclusive ``flock`` on ``<model>/.lock`` only for the short steps that must
not interleave (choosing a version number and renaming into place; rewriting live.json and
appending to the history). Everything a reader can see appears by one ``rename``.
"""

import contextlib

from service.store.comparisons import Comparisons
from service.store.files import sha256_file
from service.store.names import (
    ARRAY_NAME_RE,
    NAME_RE,
    SCHEMA,
    STAGING,
    Conflict,
    NotFound,
    StoreError,
    Unwritable,
    check_name,
    check_version,
    now_iso,
    store_root,
)
from service.store.publish import Publisher
from service.store.releases import Releases
from service.store.shadowing import Shadowing


class Store(Publisher, Releases, Comparisons, Shadowing):
    """One store root holding any number of models: read, publish, release, roll back,
    keep comparisons on record beside a version, and shadow."""

    def release(self, name: str, version: int, check=None) -> dict:
        """Make ``version`` live (:meth:`Releases.release`); a shadow naming that version
        has become live, so it is ended (history reason ``released``)."""
        record = super().release(name, version, check)
        # the release stands even if this fails: a shadow equal to the live version is
        # never scored, and `kridge shadow MODEL --off` ends it later
        with contextlib.suppress(StoreError):
            self.end_shadow(name, only=record["version"], reason="released")
        return record


__all__ = ["ARRAY_NAME_RE", "NAME_RE", "SCHEMA", "STAGING", "Conflict", "NotFound", "Store",
           "StoreError", "Unwritable", "check_name", "check_version", "now_iso", "sha256_file",
           "store_root"]
