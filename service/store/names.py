"""Names, errors and version numbers of the model store (no file access here)."""

from __future__ import annotations

import os
import re
from datetime import datetime, timezone
from pathlib import Path

from service.settings import default_store

#: The manifest schema this kridge writes. 2: the tuning record names its error by method
#: (``error_method``; ``rmse`` in curves, per kernel and chosen, where 1 wrote ``loo_rmse``
#: and ``cv_rmse`` whatever the method) and counts every decomposition made.
#: 3: ``per_target`` gives each target its kernel and ridge; the top-level ``kernel`` and
#: ``ridge`` are what all targets share, ``null`` where they differ.
SCHEMA = 3
#: Schemas this kridge reads (1 and 2 have one kernel and ridge for every target).
READABLE_SCHEMAS = (1, 2, 3)
NAME_RE = re.compile(r"[a-z0-9][a-z0-9._-]{0,63}")
#: A version as text: ASCII digits only (str.isdigit also takes '²' and other scripts'
#: digits, which int() then refuses), at most nine of them.
VERSION_RE = re.compile(r"[0-9]{1,9}")
#: The same rule for a JSON Schema ``pattern`` (the OpenAPI document).
VERSION_PATTERN = f"^{VERSION_RE.pattern}$"
ARRAY_NAME_RE = re.compile(r"[A-Za-z0-9_]{1,64}")
STAGING = ".staging"


class StoreError(Exception):
    """A store operation that cannot be done; the message is meant for the user.

    ``kind`` is the reason class people see beside a refused version (the pages): one of
    :data:`FAULT_KINDS`.
    """

    def __init__(self, message: str, kind: str = "damaged"):
        super().__init__(message)
        self.kind = kind


#: Reason classes of a refused version, as the pages show them.
FAULT_KINDS = ("checksum", "unreadable", "not a regular file", "symbolic link", "missing file",
               "damaged")


class NotFound(StoreError):
    """A model or version that does not exist."""


class Unwritable(StoreError):
    """The store cannot be written from here (read-only mount, no write permission): the
    state is fine, this process may only read it."""


class Conflict(StoreError):
    """A valid request that the store's present state does not allow (nothing to roll back
    to, a damaged history): the message says what is unknown and how to go on."""


def os_reason(exc: OSError) -> str:
    """An OS error without the file name: messages may reach HTTP answers and logs, which
    must not show where the store lives."""
    return exc.strerror or type(exc).__name__


def now_iso() -> str:
    """Current UTC time, ISO 8601 with seconds."""
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def store_root(path: str | os.PathLike | None = None) -> Path:
    """``path``, else env ``KRIDGE_STORE``, else ``./kridge-store``."""
    return Path(path or default_store())


def valid_name(name: object) -> bool:
    """True for a model name the store accepts (see :func:`check_name`)."""
    return isinstance(name, str) and bool(NAME_RE.fullmatch(name)) and name not in (".", "..")


def check_name(name: str) -> str:
    """Refuse model names that could leave the store or surprise a shell."""
    if not valid_name(name):
        raise StoreError(
            f"invalid model name {name!r}: use 1-64 characters of a-z, 0-9, '.', '_', '-', "
            "starting with a letter or digit"
        )
    return name


def is_version_text(text: str) -> bool:
    """True for a version folder's or a request's version text (see :func:`check_version`)."""
    return bool(VERSION_RE.fullmatch(text)) and int(text) >= 1


def check_version(version: object) -> int:
    """THE version parse: a positive integer, or its text in ASCII digits (at most nine).

    Every way a version comes in (route, query, command line, folder name) goes through here
    or :func:`is_version_text`; anything else is a :class:`StoreError` naming the value.
    """
    if isinstance(version, int) and not isinstance(version, bool):
        if 1 <= version < 10**9:
            return version
    elif isinstance(version, str) and is_version_text(version):
        return int(version)
    raise StoreError(f"invalid version {version!r}: versions are positive integers written "
                     "in the digits 0-9")

