"""What tells versions of a model apart, read from their manifests (schemas 1 to 3 alike):
method, features, training rows, data fingerprint, each target's kernel and ridge,
held-out error; and what changed between two versions. Shared by ``kridge versions``/``kridge
inspect`` and the model page."""

from __future__ import annotations

import hashlib
from typing import Any

from service.target_kernels import kernel_text, ridge_text, target_kernels

#: Up to this many features are listed by name; more are given as a count and a hash.
FEATURES_LISTED = 6
#: Hex digits of a sha256 shown as a fingerprint (48 bits: enough to tell versions apart).
SHORT_HASH = 12
#: Error families in the order a version's headline error is taken from, with the method
#: each is named by.
ERROR_FAMILIES = (("holdout", "holdout"), ("validation", "validation"), ("loo", "LOO"))


def method_text(manifest: dict) -> str:
    """'exact' or 'nystrom (300 landmarks)'; '?' when the manifest does not say."""
    tr = manifest.get("training") or {}
    method = tr.get("method") or "?"
    landmarks = tr.get("landmarks") or {}
    return f"{method} ({landmarks['count']} landmarks)" if landmarks.get("count") else method


def features_hash(features: list[str]) -> str:
    """Short sha256 of the feature names in order, one per line (UTF-8)."""
    return hashlib.sha256("\n".join(features).encode()).hexdigest()[:SHORT_HASH]


def features_text(features: list[str]) -> str:
    """The names when there are few, else '14 features, sha256 0123456789ab'."""
    if len(features) <= FEATURES_LISTED:
        return ", ".join(features)
    return f"{len(features)} features, sha256 {features_hash(features)}"


def data_fingerprint(manifest: dict) -> str:
    """The training file's sha256, shortened; '?' when the manifest does not hold it."""
    sha = (manifest.get("training") or {}).get("data_sha256")
    return str(sha)[:SHORT_HASH] if sha else "?"


def headline_error(metrics: dict) -> str:
    """'holdout RMSE 5.29' for the first target, named by the method that measured it."""
    for key, label in ERROR_FAMILIES:
        first = next(iter((metrics.get(key) or {}).values()), None)
        if first:
            return f"{label} RMSE {first.get('rmse', float('nan')):.4g}"
    return ""


def _settings(manifest: dict) -> list | None:
    """Each target's kernel and ridge; None when the manifest does not say them readably."""
    try:
        return target_kernels(manifest)
    except (KeyError, TypeError, ValueError, AttributeError):  # UserError is a ValueError
        return None


def facts(manifest: dict) -> dict[str, Any]:
    """The figures one version is told apart by (JSON-able). ``kernel`` and ``ridge`` name
    each target's where the targets differ."""
    features = list(manifest.get("features") or [])
    settings = _settings(manifest)
    return {
        "kernel": kernel_text(settings) if settings else "?",
        "ridge": ridge_text(settings, 4) if settings else "?",
        "method": method_text(manifest),
        "features": features_text(features),
        "feature_count": len(features),
        "training_rows": (manifest.get("training") or {}).get("rows"),
        "data_sha256": data_fingerprint(manifest),
        "error": headline_error(manifest.get("metrics") or {}),
    }


def _pair(a, b) -> dict | None:
    return None if a == b else {"from": a, "to": b}


def _metric_changes(ma: dict, mb: dict) -> dict:
    """{family: {target: {measure: {from, to}}}} for every figure that differs."""
    out: dict = {}
    for family in sorted(set(ma) | set(mb)):
        fa, fb = ma.get(family) or {}, mb.get(family) or {}
        if not isinstance(fa, dict) or not isinstance(fb, dict):
            continue
        for target in sorted(set(fa) | set(fb)):
            ta, tb = fa.get(target) or {}, fb.get(target) or {}
            if not isinstance(ta, dict) or not isinstance(tb, dict):
                continue
            for measure in ("rmse", "mae", "r2", "rows"):
                change = _pair(ta.get(measure), tb.get(measure))
                if change is not None:
                    out.setdefault(family, {}).setdefault(target, {})[measure] = change
    return out


def changes(a: dict, b: dict) -> dict[str, Any]:
    """What changed from manifest ``a`` to manifest ``b``: only what differs is named."""
    fa, fb = list(a.get("features") or []), list(b.get("features") or [])
    ka, kb = a.get("kernel") or {}, b.get("kernel") or {}
    tra, trb = a.get("training") or {}, b.get("training") or {}
    out: dict[str, Any] = {
        "features_added": [f for f in fb if f not in fa],
        "features_removed": [f for f in fa if f not in fb],
    }
    if not out["features_added"] and not out["features_removed"] and fa != fb:
        out["features_reordered"] = {"from": fa, "to": fb}
    params_a, params_b = ka.get("params") or {}, kb.get("params") or {}
    for key, change in (
        ("kernel", _pair(ka.get("name"), kb.get("name"))),
        ("method", _pair(method_text(a), method_text(b))),
        ("ridge", _pair(a.get("ridge"), b.get("ridge"))),
        ("training_rows", _pair(tra.get("rows"), trb.get("rows"))),
        ("data_sha256", _pair(tra.get("data_sha256"), trb.get("data_sha256"))),
        ("targets", _pair(a.get("targets"), b.get("targets"))),
    ):
        if change is not None:
            out[key] = change
    params = {p: c for p in sorted(set(params_a) | set(params_b))
              if (c := _pair(params_a.get(p), params_b.get(p))) is not None}
    if params:
        out["kernel_params"] = params
    own = _target_changes(_settings(a) or [], _settings(b) or [])
    if own:
        out["per_target"] = own
    metrics = _metric_changes(a.get("metrics") or {}, b.get("metrics") or {})
    if metrics:
        out["metrics"] = metrics
    return out


def _target_changes(sa: list, sb: list) -> dict:
    """{target: {"kernel" | "ridge": {from, to}}} for targets in both whose kernel or ridge
    differs (kernels in words, e.g. ``rbf(gamma=0.1)``), only when some target's own
    setting differs from the other targets' in either version."""
    if not any(len({(s.spec, s.ridge) for s in side}) > 1 for side in (sa, sb)):
        return {}
    before = {s.target: s for s in sa}
    out: dict = {}
    for s in sb:
        old = before.get(s.target)
        if old is None:
            continue
        for key, change in (("kernel", _pair(old.spec.describe(), s.spec.describe())),
                            ("ridge", _pair(old.ridge, s.ridge))):
            if change is not None:
                out.setdefault(s.target, {})[key] = change
    return out
