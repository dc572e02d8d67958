"""The warnings of a training job, each a stable short code and a message with its numbers.

:func:`collect` gathers them once per job; the manifest stores the list (``warnings``), and
``kridge train`` (stderr, also with ``--quiet``; ``--json``), ``kridge inspect`` and
``report.html`` show it. Codes:

============================ ==============================================================
``not_better_than_mean``      holdout RMSE ≥ that of predicting the training-part mean
``not_better_than_last``      (``--time``) holdout RMSE ≥ that of the last known value
``ridge_at_edge``             the chosen ridge lies at an end of the range searched
``width_at_edge``             the chosen width γ is the smallest or largest one scored
``landmark_rank_low``         the landmark kernel keeps few directions (Nyström)
``cg_capped``                 CG stopped at its iteration cap (Nyström)
``constant_feature``          a feature takes one value on every training row
``duplicate_rows``            input rows repeat; holdout rows with a copy among training rows
``float32_difference``        ``--precision float32`` moves predictions noticeably
``fit``                       any other warning of the solver
============================ ==============================================================

The holdout is judged against baselines that suit its split (:mod:`trainer.baselines`), not
against its own spread: R² = 1 − SS_res/SS_tot compares the error with the holdout's own
variance, and a time holdout covering a quiet stretch has a small variance, so a model can
beat every baseline and still show a negative R². R² stays in the metrics.
"""

from __future__ import annotations

import math

from trainer.precision import WARN_RELATIVE

#: Each code's heading in the report's Cautions section.
CODE_TITLES = {
    "not_better_than_mean": "Holdout no better than the training mean",
    "not_better_than_last": "Holdout no better than the last known value",
    "ridge_at_edge": "Ridge at the edge of its range",
    "width_at_edge": "Width at the edge of its range",
    "landmark_rank_low": "Landmark kernel of low rank",
    "cg_capped": "CG stopped at its cap",
    "constant_feature": "Constant feature",
    "duplicate_rows": "Repeated input rows",
    "float32_difference": "Single precision",
}

#: What each baseline is called in a warning.
BASELINE_WORDS = {"training_mean": ("not_better_than_mean", "the training mean"),
                  "last_value": ("not_better_than_last", "the last known value")}


def warning(code: str, message: str, **facts) -> dict:
    """One entry of the manifest's ``warnings``."""
    return {"code": code, "message": message, **facts}


def baseline_warnings(metrics: dict, baselines: dict | None) -> list[dict]:
    """One warning per target and baseline the model's holdout RMSE does not beat."""
    out = []
    holdout = metrics.get("holdout") or {}
    for kind, base in (baselines or {}).items():
        code, words = BASELINE_WORDS[kind]
        for target, m in holdout.items():
            ref = base["scores"][target]["rmse"]
            if not m["rmse"] >= ref:
                continue
            worse = (m["rmse"] / ref - 1) if ref > 0 else math.inf
            out.append(warning(code, (
                f"{target}: holdout RMSE {m['rmse']:.4g} vs {ref:.4g} for {words} "
                f"({worse:.0%} higher): on the {m['rows']} rows it did not see the model does "
                f"not beat {words}; check the features and the data before relying on its "
                "predictions"), target=target, rmse=m["rmse"], baseline_rmse=ref))
    return out


def grid_edge_warnings(tuning: dict | None) -> list[dict]:
    """The chosen ridge or width at an edge of what the search covered (for targets tuned
    one by one, each target's search, its name first)."""
    if tuning and tuning.get("per_target"):
        out = []
        for entry in tuning["per_target"]:
            for w in _edge_warnings(entry):
                out.append(dict(w, message=f"{entry['target']}: {w['message']}",
                                target=entry["target"]))
        return out
    return _edge_warnings(tuning)


def _edge_warnings(tuning: dict | None) -> list[dict]:
    chosen = (tuning or {}).get("chosen") or {}
    out = []
    ridge = chosen.get("ridge_edge")
    if ridge:
        lo, hi = ridge["range"]
        out.append(warning("ridge_at_edge", (
            f"ridge {chosen['ridge']:.4g} is at the {ridge['side']} end of the range searched "
            f"({lo:.3g} to {hi:.3g}): the best ridge may lie beyond it; "
            + ("a larger ridge than searched would smooth more; give --ridge to try one"
               if ridge["side"] == "upper" else
               "so small a ridge barely regularizes: expected for a smooth, nearly noise-free "
               "response, else check for repeated or near-copy rows, or give --ridge")),
            parameter="ridge", value=chosen["ridge"], edge=ridge["side"]))
    width = chosen.get("width_edge")
    if width:
        lo, hi = width["range"]
        upper = width["side"] == "upper"
        kind = "narrowest" if upper else "widest"
        out.append(warning("width_at_edge", (
            f"gamma {width['value']:.4g} is the {'largest' if upper else 'smallest'} "
            f"width scored ({kind} kernel; {width['scored']} widths from {lo:.3g} to "
            f"{hi:.3g}): the best width may lie beyond it; give --gamma to try one"),
            parameter="gamma", value=width["value"], edge=width["side"]))
    return out


def data_warnings(features: list[str], envelope: dict, duplicates: dict | None
                  ) -> list[dict]:
    """Constant features (scale 1, kept) and repeated input rows."""
    out = []
    for f in features:
        r = (envelope.get("ranges") or {}).get(f)
        if r and r["min"] == r["max"]:
            out.append(warning("constant_feature", (
                f"feature {f} is {r['min']:.6g} on every training row: it carries no "
                "information (kept with scale 1); a prediction for any other value of it is "
                "outside the envelope"), feature=f))
    if duplicates and duplicates["distinct"] < duplicates["rows"]:
        d = duplicates
        if d.get("holdout_with_copy"):
            copies = (f"; {d['holdout_with_copy']} of {d['holdout_rows']} holdout rows have "
                      "an exact copy among the training rows, so the holdout score is "
                      "optimistic (--group COL keeps every row of a group on one side)")
        elif d.get("holdout_rows"):
            copies = (f"; none of the {d['holdout_rows']} holdout rows has a copy among the "
                      "training rows")
        else:
            copies = ""
        out.append(warning("duplicate_rows", (
            f"{d['distinct']} distinct input rows among {d['rows']} rows"
            f"{copies}"), **d))
    return out


def precision_warnings(check: dict | None) -> list[dict]:
    """float32 changing predictions by more than :data:`WARN_RELATIVE` of a target's SD."""
    if not check:
        return []
    rel = check["relative_to_target_sd"]
    worst = max(rel.values()) if rel else 0.0
    if worst <= WARN_RELATIVE:
        return []
    return [warning("float32_difference", (
        f"float32 changes predictions on training rows by up to {worst:.2g} target SD "
        f"(more than {WARN_RELATIVE:g}); consider --precision float64"))]


def fit_warnings(training: dict, messages: list[str]) -> list[dict]:
    """The solver's own warnings: the landmark rank check and a capped CG solve."""
    rank = ((training.get("landmarks") or {}).get("rank_check") or {}).get("warning")
    out = [warning("landmark_rank_low", rank)] if rank else []
    out += [warning("cg_capped" if m.startswith("CG ") else "fit", m)
            for m in messages if m != rank]
    return out


def collect(manifest: dict, fit_messages: list[str]) -> list[dict]:
    """Every warning of a job, from its manifest (metrics, baselines, tuning, envelope,
    precision check, training section) and the solver's own messages."""
    return (baseline_warnings(manifest["metrics"], manifest.get("baselines"))
            + grid_edge_warnings(manifest.get("tuning"))
            + fit_warnings(manifest.get("training") or {}, fit_messages)
            + data_warnings(manifest["features"], manifest.get("envelope") or {},
                            (manifest.get("training") or {}).get("duplicates"))
            + precision_warnings(manifest.get("precision_check")))
