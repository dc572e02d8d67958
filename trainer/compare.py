"""``kridge compare``: score versions side by side on newly measured lab values.

Every version is loaded with :func:`service.load_model` and scored with the served path
(:meth:`service.model.Model.score`), so its predictions, intervals and envelope flags are
the ones the service would have answered. Per version and target: RMSE, MAE, bias (mean of
actual − predicted: positive means the version predicts too low), the share of rows whose
lab value lies inside the served interval at each coverage the version reports (its
calibration's levels), the share of rows outside the training envelope and quantiles of the
novelty score; the same per time window with ``--time``; and the kernel two-sample drift test
of the file's inputs against each version's training rows (:mod:`service.drift`).

The baseline is the live version (or, when it is not among those chosen, the first chosen);
each other version is set against it by the Diebold–Mariano test of squared errors
(:mod:`trainer.compare_stats`).
"""

from __future__ import annotations

import math

import numpy as np

from service.drift import PERMUTATIONS, check_drift
from service.intervals import CoverageUnavailable
from service.model import Model
from trainer.calibration import COVERAGE_LEVELS
from trainer.compare_data import LabRows, time_text, window_index, window_rule
from trainer.compare_stats import MIN_LAB_VALUES, diebold_mariano, error_figures
from trainer.errors import UserError

#: Quantiles of the novelty score reported per version (1 = the training rows' 99 % level).
NOVELTY_QUANTILES = (0.5, 0.9, 0.99)
#: The level a verdict is stated at when no ``--require-better`` level is given.
DEFAULT_LEVEL = 0.05


def choose_versions(available: list[int], live: int | None, text: str | None) -> list[int]:
    """``--versions``: 'all', a comma list, or (None) the live one and the newest."""
    if text is None:
        if live is None:
            raise UserError("no version is live; name the versions with --versions 1,2 "
                            "(the first named is the baseline)")
        return sorted({live, available[-1]})
    if text.strip() == "all":
        return list(available)
    out: list[int] = []
    for part in text.split(","):
        p = part.strip()
        if not (p.isascii() and p.isdigit()) or int(p) < 1:
            raise UserError(f"--versions takes 'all' or version numbers such as 3,5, not "
                            f"{text!r}")
        if int(p) not in available:
            raise UserError(f"--versions: there is no version {int(p)}; versions are "
                            f"{', '.join(map(str, available))}")
        if int(p) not in out:
            out.append(int(p))
    return out


def coverage_levels(model: Model) -> list[float]:
    """The coverages the version's calibration reports (manifest ``intervals``), else the
    trainer's levels; only those the stored residuals can give."""
    reported = (model.manifest.get("intervals") or {}).get("holdout_coverage") or []
    levels = [float(c["nominal"]) for c in reported if "nominal" in c] or list(COVERAGE_LEVELS)
    out = []
    for level in levels:
        try:
            model.half_width(level)
        except CoverageUnavailable:
            continue
        out.append(level)
    return out


def _figures(y: np.ndarray, pred: np.ndarray, inside: np.ndarray, novelty: np.ndarray,
             half: dict[float, np.ndarray]) -> dict:
    """Figures of one version on one target over some rows (NaN lab values left out)."""
    has = ~np.isnan(y)
    out = error_figures(y[has], pred[has])
    out["coverage"] = [{"nominal": lvl, "inside_interval": (
        float(np.mean(np.abs(y[has] - pred[has]) <= hw)) if has.any() else math.nan),
        "half_width": float(hw)} for lvl, hw in half.items()]
    out["outside_envelope"] = float(np.mean(~inside[has])) if has.any() else math.nan
    nov = novelty[has]
    out["novelty"] = {f"q{int(q * 100)}": (float(np.quantile(nov, q)) if nov.size else math.nan)
                      for q in NOVELTY_QUANTILES}
    return out


def score_version(model: Model, rows: LabRows, windows: np.ndarray | None) -> dict:
    """Predictions and figures of one version on the lab rows (module docstring)."""
    cols = [rows.features.index(f) for f in model.features]
    x = np.ascontiguousarray(rows.x[:, cols])
    if x.shape[0]:
        pred, env = model.score(x)
    else:
        pred, env = np.empty((0, len(model.targets))), []
    inside = np.array([e["inside"] for e in env], dtype=bool)
    novelty = np.array([e["novelty"] for e in env], dtype=np.float64)
    levels = coverage_levels(model)
    out = {"version": model.version, "targets": {}, "predicted": {}}
    for j, target in enumerate(rows.targets):
        if target not in model.targets:
            continue
        k = model.targets.index(target)
        half = {lvl: float(model.half_width(lvl)[k]) for lvl in levels}
        y, p = rows.y[:, j], pred[:, k]
        out["predicted"][target] = p
        fig = _figures(y, p, inside, novelty, half)
        if windows is not None:
            fig["windows"] = [_figures(y[windows == w], p[windows == w], inside[windows == w],
                                       novelty[windows == w], half)
                              for w in range(int(windows.max()) + 1 if windows.size else 0)]
        out["targets"][target] = fig
    return out


def _verdict(base: int, other: int, target: str, fa: dict, fb: dict, test: dict,
             level: float, live: int | None) -> dict:
    """Who wins on one target, at ``level``, in one sentence: ``text`` is ``before`` +
    the target's name + ``after`` (so a page can isolate the name)."""
    base_name = f"live v{base}" if base == live else f"v{base}"
    n, p = test["rows"], test["p_value"]
    if p is None:
        outcome = "none"
        before = f"v{other} and {base_name}: no test on {n} lab values of "
        after = " (too few, or identical errors)"
    else:
        better = test["mean_difference"] > 0
        outcome = ("better" if better else "worse") if p < level else "no difference"
        head = (f"v{other} beats {base_name}" if outcome == "better" else
                f"{base_name} beats v{other}" if outcome == "worse" else
                f"v{other} and {base_name} do not differ at level {level:g}")
        before = f"{head} on {n} lab values of "
        after = (f": RMSE {fb['rmse']:.4g} (v{other}) vs {fa['rmse']:.4g} ({base_name}), "
                 f"p = {p:.2g}")
    weak = n < MIN_LAB_VALUES
    if weak:
        after += (f" — weak: fewer than {MIN_LAB_VALUES} lab values, read the figures as a "
                  "hint only")
    return {"baseline": base, "version": other, "target": target, "outcome": outcome,
            "weak": weak, "text": before + target + after, "words": [before, after],
            "test": test}


def verdicts(scored: list[dict], rows: LabRows, base: int, level: float,
             live: int | None) -> list[dict]:
    """The baseline against each other version, per target, on the rows both have."""
    by_v = {s["version"]: s for s in scored}
    ordered = rows.time is not None
    out = []
    for s in scored:
        if s["version"] == base:
            continue
        for j, target in enumerate(rows.targets):
            if target not in s["targets"] or target not in by_v[base]["targets"]:
                continue
            has = ~np.isnan(rows.y[:, j])
            y = rows.y[has, j]
            ra = y - by_v[base]["predicted"][target][has]
            rb = y - s["predicted"][target][has]
            test = diebold_mariano(ra, rb, ordered)
            out.append(_verdict(base, s["version"], target, by_v[base]["targets"][target],
                                s["targets"][target], test, level, live))
    return out


def gate(found: list[dict], candidate: int, level: float) -> dict:
    """``--require-better``: the candidate passes when it beats the baseline on at least one
    target at p < level / t (Bonferroni over its t targets), is beaten on none at p < level,
    and no verdict is weak (fewer than :data:`MIN_LAB_VALUES` lab values)."""
    own = [v for v in found if v["version"] == candidate]
    if not own:
        return {"passed": False, "candidate": candidate, "reason": "no target to compare on"}
    t = len(own)
    better = [v["target"] for v in own if v["outcome"] == "better"
              and v["test"]["p_value"] < level / t]
    worse = [v["target"] for v in own if v["outcome"] == "worse"]
    weak = [v["target"] for v in own if v["weak"]]
    passed = bool(better) and not worse and not weak
    reason = ("better on " + ", ".join(better) if passed else
              "too few lab values for " + ", ".join(weak) if weak else
              "worse on " + ", ".join(worse) if worse else
              f"not better on any target at p < {level:g}/{t}")
    return {"passed": passed, "candidate": candidate, "level": level, "reason": reason,
            "rule": GATE_RULE}


GATE_RULE = ("passes when the candidate beats the baseline on at least one target at "
             "p < level / (number of targets) and the baseline beats it on none at p < level, "
             f"with at least {MIN_LAB_VALUES} lab values per target")


def compare(models: list[Model], rows: LabRows, live: int | None, level: float,
            window: float | None, permutations: int | None = None, seed: int = 0) -> dict:
    """The whole comparison as a JSON-ready dict (plus ``predicted`` arrays per version,
    removed by :func:`public`)."""
    windows = window_index(rows.time, window) if rows.time is not None else None
    scored = [score_version(m, rows, windows) for m in models]
    base = live if live in [m.version for m in models] else models[0].version
    for m, s in zip(models, scored, strict=True):
        cols = [rows.features.index(f) for f in m.features]
        if rows.inputs.shape[0] >= 2:
            res = check_drift(m, np.ascontiguousarray(rows.inputs[:, cols]),
                              PERMUTATIONS if permutations is None else permutations, seed)
            s["drift"] = res.as_dict()
        else:
            s["drift"] = None
    out = {"model": models[0].name, "live": live, "baseline": base, "level": level,
           "versions": scored, "targets": rows.targets, "counts": rows.counts,
           "verdicts": verdicts(scored, rows, base, level, live),
           "figures_method": FIGURES_METHOD, "test_method": TEST_METHOD}
    if windows is not None:
        out["windows"] = _window_spans(rows, windows, window)
    return out


def _window_spans(rows: LabRows, windows: np.ndarray, length: float | None) -> dict:
    spans = []
    for w in range(int(windows.max()) + 1 if windows.size else 0):
        t = rows.time[windows == w]
        spans.append({"window": w, "start": time_text(float(t[0]), rows.clock),
                      "end": time_text(float(t[-1]), rows.clock), "rows": int(t.size)})
    return {"rule": window_rule(length, rows.clock), "spans": spans}


FIGURES_METHOD = ("residual = actual − predicted (the served prediction); rmse = √mean "
                  "residual², mae = mean |residual|, bias = mean residual (> 0: predicts too "
                  "low); inside_interval = share of lab values within the served interval "
                  "prediction ± half_width at that nominal coverage; outside_envelope = share "
                  "of rows not inside the training envelope; novelty = quantiles of the "
                  "novelty score (> 1: farther from the training rows than 99 % of them)")
TEST_METHOD = ("Diebold–Mariano test (Diebold & Mariano 1995) of squared errors, d = "
               "baseline residual² − other residual² on the rows both versions scored; "
               "DM = mean(d) / √(V/n), two-sided normal p-value; V = Newey–West long-run "
               "variance, Bartlett weights, lag ⌊4 (n/100)^(2/9)⌋, when --time orders the rows, "
               "else the sample variance of d (rows taken as independent)")


def public(result: dict) -> dict:
    """``result`` without the prediction arrays (the ``--json`` document)."""
    return dict(result, versions=[{k: v for k, v in s.items() if k != "predicted"}
                                  for s in result["versions"]])
