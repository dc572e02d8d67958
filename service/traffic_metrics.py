"""Prometheus series of drift while serving and of the shadow version.

Each worker tests its own window of request rows, so a drift figure is one per worker;
/metrics (prometheus_client multiprocess mode) shows one value per model, taken over the
running workers: the smallest p-value (``livemin``) and the largest statistic
(``livemax``): the most alarming worker's reading. With W workers each testing at level α,
the chance that one of them alarms under no drift is at most W·α (Bonferroni), so compare
the gauge with α / W for a level-α alarm. ``live*`` modes drop a dead worker's value. Label
values are model names from the store only (bounded like every other series).
"""

from __future__ import annotations

from prometheus_client import Counter, Gauge, Histogram

DRIFT_P_VALUE = Gauge(
    "kridge_drift_p_value", "Permutation p-value of the last MMD two-sample test of a "
    "worker's sampled request rows against the live version's training sample; smallest "
    "over workers.", ["model"], multiprocess_mode="livemin")
DRIFT_STATISTIC = Gauge(
    "kridge_drift_statistic", "Unbiased MMD² of that test (version's kernel on "
    "standardized rows); largest over workers.", ["model"], multiprocess_mode="livemax")
DRIFT_ROWS = Gauge(
    "kridge_drift_window_rows", "Request rows behind the last drift test; fewest over "
    "workers.", ["model"], multiprocess_mode="livemin")
DRIFT_CHECKS = Counter(
    "kridge_drift_checks", "Drift tests run on sampled request rows.", ["model"])

#: |shadow − live| in the target's own units: 1e-6 … 1e4, three buckets per decade.
DIFF_BUCKETS = tuple(round(m * 10.0 ** e, 12) for e in range(-6, 4) for m in (1, 2.5, 5)) + (
    1e4,)
SHADOW_DIFFERENCE = Histogram(
    "kridge_shadow_abs_difference", "Absolute difference between the shadow version's and "
    "the live version's prediction for the same request row (target units; one observation "
    "per row and target).", ["model"], buckets=DIFF_BUCKETS)
SHADOW_ROWS = Counter(
    "kridge_shadow_rows", "Request rows the shadow version predicted after the live answer.",
    ["model"])
SHADOW_DROPPED = Counter(
    "kridge_shadow_dropped", "Requests not shadowed because the worker's shadow queue was "
    "full (their answers were unaffected).", ["model"])
SHADOW_FAILURES = Counter(
    "kridge_shadow_load_failures", "Shadow versions a worker refused to load (never used).",
    ["model", "version"])


def touch(name: str) -> None:
    """Create the model's shadow counters at zero, so that they show before any event."""
    SHADOW_ROWS.labels(name)
    SHADOW_DROPPED.labels(name)
    SHADOW_DIFFERENCE.labels(name)
