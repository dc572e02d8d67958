"""Bounds a target can physically take (``kridge train --target-range LO:HI``).

A concentration cannot be negative and a percentage cannot exceed 100, but a kernel model
extrapolates freely and an interval ŷ ± h is symmetric. A version trained with
``--target-range`` stores the bounds in its manifest (``target_bounds``); the service clips
every prediction and both ends of every interval to them, per target. Clipping changes no
training number (metrics, calibration residuals and the envelope's target ranges are those of
the unclipped model), and the envelope's ``target_out_of_range`` reports the unclipped value.
"""

from __future__ import annotations

import math

import numpy as np


def parse_one(text: str, target: str) -> dict:
    """``LO:HI``, ``LO:`` or ``:HI`` → {"low": LO or None, "high": HI or None}; ValueError
    naming the target and what is wrong."""
    lo_text, sep, hi_text = text.strip().partition(":")
    if not sep:
        raise ValueError(f"--target-range for {target!r}: {text!r} is not LO:HI "
                         "(write 0: for a lower bound only, :100 for an upper bound only)")
    bounds = {}
    for key, part in (("low", lo_text.strip()), ("high", hi_text.strip())):
        if not part:
            bounds[key] = None
            continue
        try:
            value = float(part)
        except ValueError:
            raise ValueError(f"--target-range for {target!r}: {part!r} is not a number"
                             ) from None
        if not math.isfinite(value):
            raise ValueError(f"--target-range for {target!r}: {part!r} is not finite")
        bounds[key] = value
    if bounds["low"] is None and bounds["high"] is None:
        raise ValueError(f"--target-range for {target!r}: give at least one bound")
    if bounds["low"] is not None and bounds["high"] is not None \
            and bounds["low"] >= bounds["high"]:
        raise ValueError(f"--target-range for {target!r}: the low bound {bounds['low']:g} "
                         f"is not below the high bound {bounds['high']:g}")
    return bounds


def parse_target_range(text: str, targets: list[str]) -> dict[str, dict]:
    """A comma list of ``LO:HI``, one per target in ``--target`` order → {target: bounds}."""
    parts = text.split(",")
    if len(parts) != len(targets):
        raise ValueError(f"--target-range has {len(parts)} range(s) for {len(targets)} "
                         f"target(s) ({', '.join(targets)}); give one LO:HI per target, "
                         "comma-separated")
    return {t: parse_one(p, t) for t, p in zip(targets, parts, strict=True)}


class TargetBounds:
    """Per-target [low, high] (±inf where a bound is absent) that predictions are clipped to."""

    def __init__(self, bounds: dict[str, dict], targets: list[str]):
        self.low = np.array([_bound(bounds[t].get("low"), -np.inf) for t in targets])
        self.high = np.array([_bound(bounds[t].get("high"), np.inf) for t in targets])

    def clip(self, y: np.ndarray) -> np.ndarray:
        """``y`` (m, t) clipped per target, in place."""
        return np.clip(y, self.low, self.high, out=y)


def _bound(value, missing: float) -> float:
    return missing if value is None else float(value)


def from_manifest(manifest: dict, targets: list[str]) -> TargetBounds | None:
    """The version's bounds, or None when it was trained without ``--target-range``."""
    section = manifest.get("target_bounds")
    if not section:
        return None
    return TargetBounds(section["bounds"], targets)
