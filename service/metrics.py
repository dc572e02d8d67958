"""Prometheus metrics. Under gunicorn, prometheus_client's multiprocess mode
(``PROMETHEUS_MULTIPROC_DIR``, set by the gunicorn config) makes every worker write its own
files and ``/metrics`` add them up, so the figures cover all workers whichever one answers."""

from __future__ import annotations

import os
from collections.abc import Callable
from datetime import datetime, timezone
from functools import lru_cache
from typing import NamedTuple

from prometheus_client import (
    CONTENT_TYPE_LATEST,
    REGISTRY,
    CollectorRegistry,
    Counter,
    Histogram,
    generate_latest,
)

from service import l1_distance

# Latency buckets in seconds: 0.1 ms to 2.5 s; single-row requests live at the low end.
BUCKETS = (0.0001, 0.00025, 0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25,
           0.5, 1.0, 2.5)

REQUEST_SECONDS = Histogram(
    "kridge_request_seconds", "Predict request time, body read to response built.",
    ["model", "version"], buckets=BUCKETS,
)
COMPUTE_SECONDS = Histogram(
    "kridge_compute_seconds", "Time in the kernel computation and envelope of a request.",
    ["model", "version"], buckets=BUCKETS,
)
ROWS = Counter("kridge_rows_predicted", "Rows predicted.", ["model", "version"])
FLAGS = Counter(
    "kridge_envelope_flags", "Rows flagged outside the training envelope, by flag.",
    ["model", "version", "flag"],
)
ERRORS = Counter("kridge_errors", "Error responses by code.", ["model", "version", "code"])
#: The ``model`` label of an error naming no model the store holds: a caller's typo or a
#: scan of random names adds no series (label values come from the store only).
UNKNOWN_MODEL = "(unknown)"
LOAD_FAILURES = Counter(
    "kridge_load_failures", "Live versions a worker refused to load.", ["model", "version"]
)
L1_COMPILES = Counter(
    "kridge_l1_compiles", "Compilations of the laplacian kernel's L1 loop, by whether a "
    "model's warm-up before serving or a request met them (request: a request waited).",
    ["during"],
)
l1_distance.ON_COMPILE.append(
    lambda during_warm: L1_COMPILES.labels("warm" if during_warm else "request").inc())


def model_label(name: str, exists: Callable[[str], bool]) -> str:
    """``name`` as a label value when ``exists(name)`` (a model in the store), "" for no
    name, else :data:`UNKNOWN_MODEL`."""
    if not name:
        return ""
    return name if exists(name) else UNKNOWN_MODEL


class VersionSeries(NamedTuple):
    """The labelled children one model version updates on every request."""

    rows: Counter
    out_of_range: Counter
    novel: Counter
    compute: Histogram
    request: Histogram


@lru_cache(maxsize=512)
def for_version(model: str, version: str) -> VersionSeries:
    """Children looked up once per (model, version), not on every request."""
    return VersionSeries(
        ROWS.labels(model, version),
        FLAGS.labels(model, version, "out_of_range"),
        FLAGS.labels(model, version, "novel"),
        COMPUTE_SECONDS.labels(model, version),
        REQUEST_SECONDS.labels(model, version),
    )


def count_request(labels: tuple[str, str], results: list[dict], compute: float,
                  seconds: float) -> None:
    """Count one answered predict request of model version ``labels``: its rows, the rows
    flagged out of range or novel, the compute time and the whole request time (seconds)."""
    series = for_version(*labels)
    series.rows.inc(len(results))
    out_of_range = novel = 0
    for r in results:  # one pass; most requests hold one row
        env = r["envelope"]
        if env["out_of_range"]:
            out_of_range += 1
        if env["novel"]:
            novel += 1
    if out_of_range:
        series.out_of_range.inc(out_of_range)
    if novel:
        series.novel.inc(novel)
    series.compute.observe(compute)
    series.request.observe(seconds)


#: When this process started counting; under gunicorn the master's start (see
#: :func:`counted_since`).
_IMPORTED = datetime.now(timezone.utc).isoformat(timespec="seconds")


def _registry() -> CollectorRegistry:
    """Every worker's figures in multiprocess mode, else this process's own."""
    if os.environ.get("PROMETHEUS_MULTIPROC_DIR"):
        from prometheus_client import multiprocess

        registry = CollectorRegistry()
        multiprocess.MultiProcessCollector(registry)
        return registry
    return REGISTRY


def exposition() -> tuple[bytes, str]:
    """The text exposition, aggregated across processes when in multiprocess mode."""
    return generate_latest(_registry()), CONTENT_TYPE_LATEST


def counted_since() -> str:
    """UTC time from which the counters count: the gunicorn master clears the metrics
    directory at start and records the moment in ``KRIDGE_METRICS_SINCE``; a process
    without gunicorn counts from its first import of this module."""
    return os.environ.get("KRIDGE_METRICS_SINCE") or _IMPORTED


class RowCounts(NamedTuple):
    """Rows predicted for one model (all versions) and how many were flagged."""

    rows: float
    out_of_range: float
    novel: float


def row_counts() -> dict[str, RowCounts]:
    """Per model: rows predicted and rows flagged, summed over versions and workers."""
    totals: dict[str, list[float]] = {}
    for family in _registry().collect():
        for sample in family.samples:
            if sample.name == "kridge_rows_predicted_total":
                slot = 0
            elif sample.name == "kridge_envelope_flags_total":
                slot = {"out_of_range": 1, "novel": 2}.get(sample.labels.get("flag"))
                if slot is None:
                    continue
            else:
                continue
            model = sample.labels.get("model", "")
            totals.setdefault(model, [0.0, 0.0, 0.0])[slot] += sample.value
    return {model: RowCounts(*values) for model, values in totals.items()}
