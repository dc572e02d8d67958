"""What the operator pages show of drift while serving and of the shadow version, read from
the aggregated metrics (all workers) and from this worker's shadow slot."""

from __future__ import annotations

from dataclasses import dataclass

from service import metrics, traffic


@dataclass
class DriftLine:
    """The last served drift test of one model (most alarming worker)."""

    p_value: str
    statistic: str
    rows: int


@dataclass
class ShadowLine:
    """One model's shadow as this worker holds it, and the compared rows of all workers."""

    named: int | None  # version shadow.json names
    used: int | None  # version this worker scores (None: not loaded or refused)
    problem: str | None
    rows: int
    dropped: int


def _samples(names: set[str]) -> dict[tuple[str, str], float]:
    """(sample name, model) → value, summed over the other labels, for ``names``."""
    out: dict[tuple[str, str], float] = {}
    for family in metrics._registry().collect():
        for s in family.samples:
            if s.name in names:
                key = (s.name, s.labels.get("model", ""))
                out[key] = out.get(key, 0.0) + s.value
    return out


def drift_lines() -> dict[str, DriftLine]:
    """Model → its last drift test, for the models tested since the service started."""
    got = _samples({"kridge_drift_p_value", "kridge_drift_statistic",
                    "kridge_drift_window_rows", "kridge_drift_checks_total"})
    lines = {}
    for (sample, model), value in got.items():
        if sample == "kridge_drift_checks_total" and value > 0:
            lines[model] = DriftLine(f"{got.get(('kridge_drift_p_value', model), 1.0):.3g}",
                                     f"{got.get(('kridge_drift_statistic', model), 0.0):.3g}",
                                     int(got.get(("kridge_drift_window_rows", model), 0)))
    return lines


def shadow_line(name: str) -> ShadowLine:
    """The shadow of ``name``: named, used here, why not, rows compared and dropped."""
    runner = traffic.CURRENT.shadow if traffic.CURRENT is not None else None
    slot = runner.slots.get(name) if runner is not None else None
    got = _samples({"kridge_shadow_rows_total", "kridge_shadow_dropped_total"})
    return ShadowLine(
        slot.wanted if slot else None, slot.model.version if slot and slot.model else None,
        slot.problem if slot else None, int(got.get(("kridge_shadow_rows_total", name), 0)),
        int(got.get(("kridge_shadow_dropped_total", name), 0)))
