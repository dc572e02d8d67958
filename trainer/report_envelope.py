"""The training report's envelope section: feature ranges, the novelty score, the PCA
shape check and the targets' ranges and bounds."""

from __future__ import annotations

from service.text_safety import html_name
from trainer.report_tables import Raw, esc, table


def envelope_section(manifest: dict) -> list[str]:
    env = manifest.get("envelope", {})
    std = manifest.get("standardization", {})
    rows = []
    for j, f in enumerate(manifest["features"]):
        r = env.get("ranges", {}).get(f, {})
        rows.append([Raw(html_name(f)), r.get("min"), r.get("max"),
                     (std.get("mean") or [None] * (j + 1))[j],
                     (std.get("scale") or [None] * (j + 1))[j]])
    out = ["<h2>Training envelope</h2>",
           table(["feature", "min", "max", "mean", "scale (SD)"], rows)]
    nov = env.get("novelty", {})
    if nov:
        out.append(table(["", ""], [
            [Raw("novelty method"), Raw(esc(nov.get("method", "")))],
            [Raw("k"), nov.get("k")],
            [Raw("threshold distance"), nov.get("threshold_distance")],
            [Raw("calibration"), Raw(esc(nov.get("calibration", "")))],
            [Raw("training rows flagged"), nov.get("training_rows_flagged")],
        ], left=2))
    return out + _shape_and_target_tables(manifest)


def _shape_and_target_tables(manifest: dict) -> list[str]:
    """The PCA check (T² and Q limits) and the targets' training ranges and bounds."""
    env, out = manifest.get("envelope", {}), []
    pca = env.get("pca")
    if pca:
        flagged = pca.get("training_rows_flagged") or {}
        out.append(table(["", ""], [
            [Raw("shape check"), Raw(esc(pca.get("method", "")))],
            [Raw("components"), Raw(esc(f"{pca['components']} ({pca['components_rule']})"))],
            [Raw("explained variance"), pca.get("explained_variance")],
            [Raw(f"T² limit at {pca['level']}"), pca.get("t2_limit")],
            [Raw("Q limit"), pca.get("q_limit") if pca.get("q_limit") is not None
             else Raw("none (no variance left off the components)")],
            [Raw("Q limit formula"), Raw(esc(str(pca.get("q_limit_formula"))))],
            [Raw("training rows flagged by T²"), flagged.get("t2")],
            [Raw("training rows flagged by Q"), flagged.get("q")],
        ], left=2))
    ranges = env.get("target_ranges") or {}
    bounds = (manifest.get("target_bounds") or {}).get("bounds") or {}
    if ranges:
        rows = [[Raw(html_name(t)), r.get("min"), r.get("max"),
                 Raw(esc(_bound_text(bounds.get(t))))] for t, r in ranges.items()]
        out.append(table(["target", "training min", "training max",
                           "clipped to (--target-range)"], rows))
    return out


def _bound_text(bound: dict | None) -> str:
    if not bound:
        return "–"
    lo, hi = bound.get("low"), bound.get("high")
    return f"{'−∞' if lo is None else f'{lo:g}'} to {'+∞' if hi is None else f'{hi:g}'}"
