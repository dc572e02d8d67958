"""Service settings from the environment, each with a default.

=========================  ===============================================  ==============
variable                   meaning                                          default
=========================  ===============================================  ==============
KRIDGE_STORE               store root                                       ./kridge-store
KRIDGE_BIND                address gunicorn listens on                      127.0.0.1:8000
KRIDGE_WORKERS             gunicorn worker processes (threaded)             max(2, cores)
KRIDGE_MAX_BODY_BYTES      largest request body accepted                    8 MiB
KRIDGE_MAX_ROWS            most rows in one predict request                 10000
KRIDGE_POLL_SECONDS        how often each worker re-reads live.json         0.25
KRIDGE_PINNED_CACHE        pinned (non-live) versions kept loaded           4
KRIDGE_ADMIN_TOKEN         bearer token for release/rollback routes         unset: disabled
KRIDGE_ENGINE_THREADS      threads one worker may use for a large batch     cores // workers
KRIDGE_DRAIN_SECONDS       after SIGTERM: /readyz 503, still answering      0 (off)
KRIDGE_ACCESS_LOG          JSON-lines access log: ``-`` stdout, or a file   unset: off
KRIDGE_DRIFT_WINDOW        request rows sampled per model for drift checks  300
KRIDGE_DRIFT_SECONDS       seconds between a worker's drift checks          60 (0: off)
KRIDGE_DRIFT_PERMUTATIONS  permutations behind a served drift p-value       200
KRIDGE_SHADOW_QUEUE        requests waiting for the shadow, per worker      256
KRIDGE_SHADOW_PAIRS        JSON-lines file of live/shadow prediction pairs  unset: off
=========================  ===============================================  ==============

"cores" is what this process may really use: the CPU affinity mask, capped by a cgroup CPU
quota (a container's CPU limit), rounded up. The Dockerfile sets ``KRIDGE_ACCESS_LOG=-`` and
``KRIDGE_DRAIN_SECONDS=5``; the Kubernetes Deployment sets the drain together with the pod's
termination grace period.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field
from pathlib import Path

from service.errors import UserError

#: Store root when neither ``--store`` nor ``KRIDGE_STORE`` names one.
DEFAULT_STORE = "kridge-store"

#: Limits and intervals, one constant each: the dataclass and ``from_env`` share them.
MAX_BODY_BYTES = 8 << 20
MAX_ROWS = 10_000
POLL_SECONDS = 0.25
PINNED_CACHE = 4
DRIFT_WINDOW = 300
DRIFT_SECONDS = 60.0
DRIFT_PERMUTATIONS = 200
SHADOW_QUEUE = 256


def default_store() -> str:
    """Env ``KRIDGE_STORE``, else :data:`DEFAULT_STORE`."""
    return os.environ.get("KRIDGE_STORE") or DEFAULT_STORE


def _int(name: str, default: int) -> int:
    raw = os.environ.get(name)
    if raw is None or raw == "":
        return default
    try:
        value = int(raw)
    except ValueError:
        raise UserError(f"environment variable {name}={raw!r} is not an integer") from None
    if value < 1:
        raise UserError(f"environment variable {name} must be at least 1, got {value}")
    return value


def _number(name: str, default: float) -> float:
    """The variable as a float, or ``default`` when it is unset or empty."""
    raw = os.environ.get(name)
    if not raw:
        return default
    try:
        return float(raw)
    except ValueError:
        raise UserError(f"environment variable {name}={raw!r} is not a number") from None


def _float(name: str, default: float) -> float:
    value = _number(name, default)
    if not value > 0:
        raise UserError(f"environment variable {name} must be positive, got {value}")
    return value


def _seconds(name: str, default: float) -> float:
    """A duration that may be zero (feature off)."""
    value = _number(name, default)
    if not 0 <= value < 3600:
        raise UserError(f"environment variable {name} must be in [0, 3600) s, got {value}")
    return value


def cgroup_cpu_limit(root: Path = Path("/sys/fs/cgroup")) -> float | None:
    """CPU quota of this cgroup in cores (cgroup v2 ``cpu.max``, else v1), None if unlimited."""
    try:
        quota, period = (root / "cpu.max").read_text().split()[:2]
        if quota != "max":
            return int(quota) / int(period)
        return None
    except (OSError, ValueError):
        pass
    try:
        quota = int((root / "cpu" / "cpu.cfs_quota_us").read_text())
        period = int((root / "cpu" / "cpu.cfs_period_us").read_text())
    except (OSError, ValueError):
        return None
    return quota / period if quota > 0 and period > 0 else None


def usable_cores() -> int:
    """Cores this process can keep busy: affinity mask, capped by a cgroup quota."""
    try:
        cores = len(os.sched_getaffinity(0)) or 1
    except AttributeError:  # not on Linux
        cores = os.cpu_count() or 1
    limit = cgroup_cpu_limit()
    if limit is not None:
        cores = min(cores, max(1, math.ceil(limit)))
    return cores


def default_workers() -> int:
    """Workers: one per core (prediction is CPU-bound), at least two so that a long
    batch on one worker never leaves the probes unanswered."""
    return max(2, usable_cores())


def worker_count() -> int:
    return _int("KRIDGE_WORKERS", default_workers())


def drain_seconds() -> float:
    return _seconds("KRIDGE_DRAIN_SECONDS", 0.0)


def access_log_target() -> str | None:
    """``-`` for stdout, a file path, or None (``off``, empty or unset)."""
    raw = (os.environ.get("KRIDGE_ACCESS_LOG") or "").strip()
    return None if raw.lower() in ("", "off", "0", "false", "no") else raw


@dataclass(frozen=True)
class Settings:
    store: str = DEFAULT_STORE
    max_body_bytes: int = MAX_BODY_BYTES
    max_rows: int = MAX_ROWS
    poll_seconds: float = POLL_SECONDS
    pinned_cache: int = PINNED_CACHE
    admin_token: str | None = field(default=None, repr=False)
    access_log: str | None = None
    drift_window: int = DRIFT_WINDOW
    drift_seconds: float = DRIFT_SECONDS
    drift_permutations: int = DRIFT_PERMUTATIONS
    shadow_queue: int = SHADOW_QUEUE
    shadow_pairs: str | None = None

    @classmethod
    def from_env(cls, **overrides) -> Settings:
        values = dict(
            store=default_store(),
            max_body_bytes=_int("KRIDGE_MAX_BODY_BYTES", MAX_BODY_BYTES),
            max_rows=_int("KRIDGE_MAX_ROWS", MAX_ROWS),
            poll_seconds=_float("KRIDGE_POLL_SECONDS", POLL_SECONDS),
            pinned_cache=_int("KRIDGE_PINNED_CACHE", PINNED_CACHE),
            admin_token=os.environ.get("KRIDGE_ADMIN_TOKEN") or None,
            access_log=access_log_target(),
            drift_window=_int("KRIDGE_DRIFT_WINDOW", DRIFT_WINDOW),
            drift_seconds=_seconds("KRIDGE_DRIFT_SECONDS", DRIFT_SECONDS),
            drift_permutations=_int("KRIDGE_DRIFT_PERMUTATIONS", DRIFT_PERMUTATIONS),
            shadow_queue=_int("KRIDGE_SHADOW_QUEUE", SHADOW_QUEUE),
            shadow_pairs=os.environ.get("KRIDGE_SHADOW_PAIRS") or None,
        )
        values.update({k: v for k, v in overrides.items() if v is not None})
        return cls(**values)
