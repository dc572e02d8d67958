"""What the pages for people show, gathered from the store, the loaded models and the metrics.

Every function takes what it reads as arguments (a :class:`~service.store.Store`, the loaded
live models, row counts from :mod:`service.metrics`), so the blueprint in
:mod:`service.pages` stays a thin layer of routes. Nothing here writes anything.

Messages shown to people come from the store's own errors, which never name a file path; the
store's root is removed from them all the same (:func:`safe_message`).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field

from markupsafe import Markup

from service.intervals import measured_coverage
from service.metrics import RowCounts
from service.store import Store, StoreError
from service.target_kernels import kernel_text as targets_kernel_text
from service.target_kernels import ridge_text, target_kernels
from service.text_safety import html_name
from service.version_facts import (
    FEATURES_LISTED,
    data_fingerprint,
    features_text,
    method_text,
)


def safe_message(store: Store, exc: Exception) -> str:
    """The error's text for a page: never the store's location."""
    text = str(exc)
    for root in {str(store.root), str(store.root.resolve())}:
        text = text.replace(root, "the store")
    return text


def kernel_text(manifest: dict) -> str:
    """``rbf(gamma=0.2)``, or each target's where they differ; the raw name when the
    manifest's parameters do not parse."""
    try:
        return targets_kernel_text(target_kernels(manifest))
    except (KeyError, TypeError, ValueError, AttributeError):
        return str((manifest.get("kernel") or {}).get("name", "unknown"))


def ridge_cell(manifest: dict) -> str:
    """The ridge, or each target's where they differ; '–' when the manifest lacks it."""
    try:
        return ridge_text(target_kernels(manifest), 4)
    except (KeyError, TypeError, ValueError, AttributeError):
        return number(manifest.get("ridge"))


def number(value, digits: int = 4) -> str:
    """A figure for people: ``digits`` significant digits, no exponent for everyday sizes."""
    if value is None or isinstance(value, bool) or not isinstance(value, int | float):
        return "–"
    if not math.isfinite(value):
        return str(value)
    return f"{value:.{digits}g}"


@dataclass
class Score:
    """One held-out (or leave-one-out) figure set for one target."""

    target: str
    kind: str  # "holdout" or "leave-one-out"
    rmse: str
    r2: str


def scores(manifest: dict) -> list[Score]:
    """Held-out error per target; leave-one-out when the version kept no holdout."""
    metrics = manifest.get("metrics") or {}
    for key, kind in (("holdout", "holdout"), ("loo", "leave-one-out")):
        block = metrics.get(key)
        if isinstance(block, dict) and block:
            return [Score(t, kind, number(m.get("rmse")), number(m.get("r2"), 3))
                    for t, m in block.items() if isinstance(m, dict)]
    return []


@dataclass
class FlagShare:
    """Rows flagged outside the envelope since the counters started."""

    rows: int
    out_of_range: str  # percentage text
    novel: str


def flag_share(counts: RowCounts | None) -> FlagShare | None:
    """Shares of predicted rows outside a training range and novel; None before any row."""
    if counts is None or counts.rows <= 0:
        return None
    return FlagShare(int(counts.rows), f"{100 * counts.out_of_range / counts.rows:.1f} %",
                     f"{100 * counts.novel / counts.rows:.1f} %")


@dataclass
class ModelLine:
    """One model on the overview."""

    name: str
    live: int | None = None
    since: str | None = None
    served: int | None = None  # version this worker answers with (None: not loaded)
    kernel: str = "–"
    rows: str = "–"
    scores: list[Score] = field(default_factory=list)
    flags: FlagShare | None = None
    problem: str | None = None
    refused: str | None = None  # reason class when this worker refused the live version


def overview(store: Store, served: dict[str, int | None], counts: dict[str, RowCounts],
             refused: Callable[[str, int | None], str | None] = lambda *_: None
             ) -> list[ModelLine]:
    """Every model in the store: live version and since when, the live version's kernel,
    training rows and held-out error, and its flagged share of predicted rows.

    ``served`` maps a model to the version loaded in this worker (``LiveModels.readiness``);
    ``refused(name, version)`` says why this worker refused that version (``LiveModels.refused``).
    """
    lines = []
    for name in store.models():
        line = ModelLine(name, served=served.get(name), flags=flag_share(counts.get(name)))
        try:
            entry = store.live(name)
            if entry is not None:
                line.live, line.since = entry["version"], entry.get("since")
                line.refused = refused(name, line.live)
                man = store.read_manifest(name, line.live)
                line.kernel = kernel_text(man)
                line.rows = number((man.get("training") or {}).get("rows"), 12)
                line.scores = scores(man)
        except StoreError as exc:
            line.problem = safe_message(store, exc)
        lines.append(line)
    return lines


@dataclass
class VersionCard:
    """One version in the side-by-side table of a model's page."""

    version: int
    live: bool
    created: str = "–"
    kernel: str = "–"
    ridge: str = "–"
    rows: str = "–"
    method: str = "–"
    features: str = "–"  # HTML: names isolated (Markup)
    data: str = "–"
    scores: list[Score] = field(default_factory=list)
    intervals: str = "none stored"
    coverage: list[str] = field(default_factory=list)
    shape: str = "none stored"  # the PCA check in words
    bounds: str = "none"  # --target-range
    has_report: bool = False
    problem: str | None = None

    def score(self, target: str, kind: str) -> Score | None:
        return next((s for s in self.scores if (s.target, s.kind) == (target, kind)), None)


def _intervals(manifest: dict) -> tuple[str, list[str]]:
    """(method in words, measured coverage per nominal level) of a version's intervals.

    The coverage lines are the trainer's check on rows neither the fit nor the calibration
    saw: "90 %: 91.0 % on 400 rows" (per target when there are several: HTML then, each
    target name isolated in ``<bdi>``).
    """
    info = manifest.get("intervals")
    if not isinstance(info, dict):
        return "none stored", []
    method = str(info.get("method") or "stored")
    targets = list(manifest.get("targets") or [])
    lines = []
    for level in info.get("holdout_coverage") or []:
        try:
            got = measured_coverage(level)
            if got is None:  # unbounded half-width: nothing measured, never "100 %"
                lines.append(Markup("{} %: not available (too few calibration residuals "
                                    "for this coverage)").format(
                                        f"{100 * float(level['nominal']):g}"))
                continue
            measured = [f"{100 * v:.1f} %" for v in got]
            if len(measured) == len(targets) > 1:
                measured = [Markup("{} {}").format(html_name(str(t)), m)
                            for t, m in zip(targets, measured, strict=True)]
            lines.append(Markup("{} %: {} on {} rows").format(
                f"{100 * float(level['nominal']):g}", Markup(", ").join(measured),
                int(level["rows"])))
        except (KeyError, TypeError, ValueError):
            continue
    return method, lines


def shape_text(manifest: dict) -> str:
    """The version's PCA check in a line: components, variance, limits' level."""
    pca = (manifest.get("envelope") or {}).get("pca")
    if not isinstance(pca, dict):
        return "none stored"
    try:
        q = "and Q" if pca.get("q_limit") is not None else "(no Q: nothing left off them)"
        return (f"T² {q} on {int(pca['components'])} components "
                f"({100 * float(pca['explained_variance']):.1f} % of the variance), "
                f"limits at {float(pca['level']):g}")
    except (KeyError, TypeError, ValueError):
        return "stored"


def bounds_text(manifest: dict) -> str:
    """The targets' bounds from --target-range: ``fat 0 to +∞``; HTML (names isolated)."""
    section = manifest.get("target_bounds")
    if not isinstance(section, dict) or not isinstance(section.get("bounds"), dict):
        return "none"
    parts = []
    for target, b in section["bounds"].items():
        lo, hi = (b or {}).get("low"), (b or {}).get("high")
        parts.append(Markup("{} {} to {}").format(
            html_name(str(target)), "−∞" if lo is None else number(lo, 6),
            "+∞" if hi is None else number(hi, 6)))
    return Markup("; ").join(parts)


def feature_cells(features: list[str]) -> str:
    """The feature names, each isolated, when few; else their count and short hash."""
    if len(features) <= FEATURES_LISTED:
        return Markup(", ").join(html_name(f) for f in features)
    return features_text(features)


def versions(store: Store, name: str, live: int | None) -> list[VersionCard]:
    """Every version of ``name``, newest first; a damaged one says what is wrong with it."""
    cards = []
    for v in sorted(store.versions(name), reverse=True):
        card = VersionCard(v, v == live)
        try:
            man = store.read_manifest(name, v)
            card.created = str(man.get("created") or "–")
            card.kernel = kernel_text(man)
            card.ridge = ridge_cell(man)
            card.rows = number((man.get("training") or {}).get("rows"), 12)
            card.method = method_text(man)
            card.features = feature_cells(list(man.get("features") or []))
            card.data = data_fingerprint(man)
            card.scores = scores(man)
            card.intervals, card.coverage = _intervals(man)
            card.shape, card.bounds = shape_text(man), bounds_text(man)
            card.has_report = store.report_path(name, v) is not None
        except StoreError as exc:
            card.problem = safe_message(store, exc)
        cards.append(card)
    return cards


def score_keys(cards: list[VersionCard]) -> list[tuple[str, str]]:
    """(target, kind) of every score some version has, in first-seen order: the rows of
    the side-by-side table."""
    keys: list[tuple[str, str]] = []
    for card in cards:
        for s in card.scores:
            if (s.target, s.kind) not in keys:
                keys.append((s.target, s.kind))
    return keys


@dataclass
class Event:
    """One release or rollback in a model's history."""

    time: str
    action: str
    version: int
    previous: int | None
    note: str | None = None


def timeline(store: Store, name: str) -> tuple[list[Event], str | None]:
    """Releases and rollbacks, newest first, and a problem note when the history is damaged
    (the readable records are still shown)."""
    good, bad = store.readable_history(name)
    events = [Event(str(rec.get("time") or "–"), rec["action"], rec["version"],
                    rec.get("previous") if isinstance(rec.get("previous"), int) else None,
                    rec.get("repaired") if isinstance(rec.get("repaired"), str) else None)
              for rec in good]
    problem = None
    if bad:
        lines = ", ".join(str(n) for n in bad[:5])
        problem = f"history line(s) {lines} cannot be read and are left out"
    return events[::-1], problem
