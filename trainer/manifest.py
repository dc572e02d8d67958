"""The manifest: what was fitted, on what, and how well — one builder for every solver.

The manifest is the bundle's JSON description: the loaded model reads
its standardization, kernel, intercept, envelope and interval calibration from it, and
``kridge inspect`` and ``report.html`` present the rest (data fingerprint, tuning account,
metrics, interval method and its measured coverage).
"""

from __future__ import annotations

import platform
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from service.kernels import KernelSpec
from service.store import now_iso

if TYPE_CHECKING:
    from trainer.exact.fit import Fit


def time_text(value: float, clock: bool) -> str | float:
    """A time value as the user wrote it: ISO 8601 (UTC) for clock times, else the number."""
    if not clock:
        return float(value)
    return datetime.fromtimestamp(value, tz=timezone.utc).isoformat(timespec="seconds")


def time_span(column: str | None, times: np.ndarray | None, clock: bool) -> dict | None:
    """First and last time of the training rows, for the manifest and the envelope."""
    if times is None:
        return None
    return {"column": column, "start": time_text(times.min(), clock),
            "end": time_text(times.max(), clock),
            "kind": "ISO 8601, UTC" if clock else "number"}


def library_versions() -> dict[str, str]:
    import importlib.metadata as md

    out = {"python": platform.python_version()}
    for lib in ("kridge", "numpy", "scipy"):
        try:
            out[lib] = md.version(lib)
        except md.PackageNotFoundError:
            out[lib] = "unknown"
    return out


def build_manifest(*, features: list[str], targets: list[str], spec: KernelSpec,
                   ridge: float, standardization: dict, intercept: np.ndarray, training: dict,
                   tuning: dict | None, metrics: dict, envelope: dict, intervals: dict | None,
                   precision: str, check: dict | None) -> dict:
    """The manifest of any model: the one builder both solvers use (the store adds
    ``schema``, ``model``, ``version`` and ``arrays`` when it publishes)."""
    return {
        "created": now_iso(),
        "features": list(features),
        "targets": list(targets),
        "kernel": {"name": spec.name, "params": spec.params()},
        "ridge": ridge,
        "standardization": standardization,
        "intercept": np.asarray(intercept).tolist(),
        "training": training,
        "tuning": tuning,
        "metrics": metrics,
        "envelope": envelope,
        "intervals": intervals,
        "precision": precision,
        "precision_check": check,
        "libraries": library_versions(),
    }


def exact_manifest(opts, *, data, final: Fit, spec: KernelSpec, ridge: float, rows: int,
                   holdout_rows: int, timed: bool, span: dict | None, fit_seconds: float,
                   reason: str, tuning_info: dict | None, metrics: dict, envelope: dict,
                   intervals: dict | None, check: dict | None) -> dict:
    """The manifest of an exact fit (``opts``: the train options; ``data``: the loaded
    training data, for its fingerprint, format and row account)."""
    return build_manifest(
        features=data.features, targets=opts.targets, spec=spec, ridge=ridge,
        standardization={"mean": final.scaler.mean.tolist(),
                         "scale": final.scaler.scale.tolist(), "ddof": 0},
        intercept=final.intercept, tuning=tuning_info, metrics=metrics, envelope=envelope,
        intervals=intervals, precision=opts.precision, check=check,
        training={
            "rows": int(rows),
            "data_file": Path(opts.data).name,
            "data_sha256": data.sha256,
            "data_format": data.dialect,
            "row_counts": data.counts,
            "time": span,
            "holdout_kind": ("the most recent rows in time" if timed
                             else "seeded random draw"),
            "holdout_fraction": opts.holdout,
            "holdout_rows": int(holdout_rows),
            "seed": opts.seed,
            "fit_seconds": round(fit_seconds, 3),
            "method": "exact",
            "method_reason": reason,
            "solver": "cholesky (scipy.linalg.cho_factor)",
            "final_fit": "refitted on all rows with the chosen parameters",
        })


def nystrom_training(*, rows: int, reason: str, landmarks: dict, parts: dict, src, data: str,
                     counts: dict, span, holdout: float, by_time: bool, seed: int,
                     fit_seconds: float, cluster: bool, solve: dict | None = None) -> dict:
    """A Nyström model's ``training`` entry: method, why, landmarks, rows and parts."""
    return {
        "rows": rows,
        "method": "nystrom",
        "method_reason": reason,
        "landmarks": landmarks,
        "parts": parts,
        "data_file": data,
        "data_sha256": src.sha256,
        "data_format": src.dialect(),
        "row_counts": counts,
        "time": span,
        "holdout_fraction": holdout,
        "holdout_rows": parts["holdout"],
        "holdout_kind": "the most recent rows in time" if by_time
        else "seeded random draw per block",
        "seed": seed,
        "fit_seconds": round(fit_seconds, 3),
        "solver": ("Nyström normal equations (K_nmᵀK_nm + ridge·K_mm)β = K_nmᵀ(y − ȳ), "
                   + ("preconditioned conjugate gradient (FALKON's preconditioner, Rudi, "
                      "Carratino & Rosasco 2017), K_nm formed tile by tile in every "
                      "iteration" if solve and solve.get("solver") == "cg" else
                      "streamed sums, eigendecompositions of K_mm and of the m × m "
                      "normal matrix")),
        "solve": solve,
        "cluster": cluster,
        "final_fit": "the training part only: holdout and calibration rows stay unseen",
    }
