"""The manifest: what was fitted, on what, and how well — one builder for every solver.

The manifest is the bundle's JSON description: the loaded model reads
its standardization, kernel, intercept, envelope and interval calibration from it, and
``kridge inspect`` and ``report.html`` present the rest (data fingerprint, tuning account,
metrics, interval method and its measured coverage).
"""

from __future__ import annotations

import platform
from datetime import datetime, timezone
from typing import TYPE_CHECKING

import numpy as np

from service.store import now_iso
from service.target_kernels import shared_entries

if TYPE_CHECKING:
    from trainer.plan import Plan
    from trainer.read.dates import TimeRule
    from trainer.solvers import Fitted, Rows
    from trainer.validation.splits import HoldoutSplit, PartSplit


def time_text(value: float, clock: bool) -> str | float:
    """A time value as the user wrote it: ISO 8601 (UTC) for clock times, else the number."""
    if not clock:
        return float(value)
    return datetime.fromtimestamp(value, tz=timezone.utc).isoformat(timespec="seconds")


def time_span(column: str | None, times: np.ndarray | None, clock: bool,
              rule: TimeRule | None = None) -> dict | None:
    """First and last time of the training rows, for the manifest and the envelope;
    ``rule``: how the column's text was read, recorded when not ISO 8601 or numbers."""
    if times is None:
        return None
    span = {"column": column, "start": time_text(times.min(), clock),
            "end": time_text(times.max(), clock),
            "kind": "ISO 8601, UTC" if clock else "number"}
    if rule is not None and rule.formats:
        span["read_as"] = rule.describe()
    return span


def library_versions() -> dict[str, str]:
    import importlib.metadata as md

    out = {"python": platform.python_version()}
    for lib in ("kridge", "numpy", "scipy"):
        try:
            out[lib] = md.version(lib)
        except md.PackageNotFoundError:
            out[lib] = "unknown"
    return out


def build_manifest(plan: Plan, rows: Rows, split: HoldoutSplit | PartSplit,
                   fitted: Fitted, *, metrics: dict, envelope: dict, intervals: dict | None,
                   check: dict | None, span: dict | None) -> dict:
    """The manifest of any model, fed by the solver's :class:`~trainer.solvers.Fitted` (the
    store adds ``schema``, ``model``, ``version`` and ``arrays`` when it publishes).

    ``kernel`` and ``ridge`` are what every target shares (``null`` where targets differ);
    ``per_target`` gives each target's (:mod:`service.target_kernels`)."""
    targets = list(plan.columns.targets)
    return {
        "created": now_iso(),
        "features": list(plan.columns.features),
        "targets": targets,
        **shared_entries(fitted.settings(targets)),
        "standardization": fitted.standardization,
        "intercept": np.asarray(fitted.intercept).tolist(),
        "training": training_section(plan, rows, split, fitted, span),
        "tuning": fitted.tuning,
        "metrics": metrics,
        "envelope": envelope,
        "intervals": intervals,
        "target_bounds": target_bounds_section(plan.output.bounds),
        "precision": plan.output.precision,
        "precision_check": check,
        "libraries": library_versions(),
        # text features' categories in one-hot column order (service.categories)
        **({"categories": rows.encoding.categories} if rows.encoding else {}),
    }


def target_bounds_section(bounds: dict | None) -> dict | None:
    """The manifest's ``target_bounds``: what ``--target-range`` gave and what the service
    does with it (:mod:`service.target_bounds`); None without it."""
    if bounds is None:
        return None
    return {"bounds": bounds,
            "rule": "the service clips each prediction and both interval ends to [low, high] "
                    "per target (a missing bound does not clip); training metrics and "
                    "calibration are of the unclipped model"}


def training_section(plan: Plan, rows: Rows, split: HoldoutSplit | PartSplit,
                     fitted: Fitted, span: dict | None) -> dict:
    """The manifest's ``training``: the data, the split, the method and why, then the
    solver's own entries (landmarks, parts, how it solves, what the final fit saw)."""
    holdout = fitted.evidence.holdout
    return {
        "rows": int(fitted.rows),
        "method": plan.method.name,
        "method_reason": plan.method.reason,
        "data_file": plan.source.path.name,
        "data_sha256": plan.source.sha256,
        "data_format": plan.source.dialect(),
        "row_counts": rows.counts,
        "time": span,
        "holdout_kind": split.kind,
        "holdout_fraction": plan.splits.holdout,
        "holdout_rows": holdout.rows if holdout is not None else 0,
        "seed": plan.splits.seed,
        "fit_seconds": round(fitted.fit_seconds, 3),
        "target_kernels": target_kernels_text(plan, fitted),
        **fitted.training,
    }


def target_kernels_text(plan: Plan, fitted: Fitted) -> str:
    """How the targets came by their kernels and ridges (the manifest's
    ``training.target_kernels``)."""
    t = len(plan.columns.targets)
    if t == 1:
        return "one target"
    if fitted.per_target is not None and plan.method.name == "nystrom":
        return ("one kernel for all targets, tuned together on the sample (mean over targets "
                "of MSE / Var(target)); each target its own ridge, on the validation part")
    if fitted.per_target is not None:
        return "each target tuned for itself: its own kernel and ridge"
    if not plan.parameters.to_tune:
        return "kernel and ridge given: the same for every target"
    if plan.method.name == "nystrom" and not plan.parameters.shared:
        return ("one kernel and ridge for all targets (the CG solve, or too few validation "
                "rows, gives no ridge per target), tuned on the mean over targets of MSE / "
                "Var(target)")
    return "one kernel and ridge for all targets (--shared-kernel), tuned on the mean over " \
        "targets of MSE / Var(target)"
