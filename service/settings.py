"""Service settings from the environment, each with a default.

=========================  ===============================================  ==============
variable                   meaning                                          default
=========================  ===============================================  ==============
KRIDGE_STORE               store root                                       ./kridge-store
KRIDGE_BIND                address gunicorn listens on                      127.0.0.1:8000
KRIDGE_WORKERS             gunicorn worker processes                        2
KRIDGE_MAX_BODY_BYTES      largest request body accepted                    8 MiB
KRIDGE_MAX_ROWS            most rows in one predict request                 10000
KRIDGE_POLL_SECONDS        how often each worker re-reads live.json         0.25
KRIDGE_PINNED_CACHE        pinned (non-live) versions kept loaded           4
KRIDGE_ADMIN_TOKEN         bearer token for release/rollback routes         unset: disabled
KRIDGE_ENGINE_THREADS      threads one worker may use for a large batch     cores // workers
=========================  ===============================================  ==============
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field

#: Store root when neither ``--store`` nor ``KRIDGE_STORE`` names one.
DEFAULT_STORE = "kridge-store"


def _int(name: str, default: int) -> int:
    raw = os.environ.get(name)
    if raw is None or raw == "":
        return default
    try:
        value = int(raw)
    except ValueError:
        raise ValueError(f"environment variable {name}={raw!r} is not an integer") from None
    if value < 1:
        raise ValueError(f"environment variable {name} must be at least 1, got {value}")
    return value


def _float(name: str, default: float) -> float:
    raw = os.environ.get(name)
    if not raw:
        return default
    try:
        value = float(raw)
    except ValueError:
        raise ValueError(f"environment variable {name}={raw!r} is not a number") from None
    if not value > 0:
        raise ValueError(f"environment variable {name} must be positive, got {value}")
    return value


@dataclass(frozen=True)
class Settings:
    store: str = DEFAULT_STORE
    max_body_bytes: int = 8 << 20
    max_rows: int = 10_000
    poll_seconds: float = 0.25
    pinned_cache: int = 4
    admin_token: str | None = field(default=None, repr=False)

    @classmethod
    def from_env(cls, **overrides) -> Settings:
        values = dict(
            store=os.environ.get("KRIDGE_STORE") or DEFAULT_STORE,
            max_body_bytes=_int("KRIDGE_MAX_BODY_BYTES", 8 << 20),
            max_rows=_int("KRIDGE_MAX_ROWS", 10_000),
            poll_seconds=_float("KRIDGE_POLL_SECONDS", 0.25),
            pinned_cache=_int("KRIDGE_PINNED_CACHE", 4),
            admin_token=os.environ.get("KRIDGE_ADMIN_TOKEN") or None,
        )
        values.update({k: v for k, v in overrides.items() if v is not None})
        return cls(**values)
