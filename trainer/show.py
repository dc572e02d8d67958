"""Plain-text presentation for the command line: tables and manifest summaries.

Every cell and value printed here goes through :func:`service.text_safety.visible`: names
from the data (and from stores written before the name rule) never send a raw control or
bidirectional character to the terminal.
"""

from __future__ import annotations

import sys

from service.intervals import measured_coverage
from service.target_kernels import kernel_text, ridge_text, target_kernels
from service.text_safety import visible
from service.version_facts import features_hash


def coverage_text(level: dict) -> str:
    """One level's measured coverage, or why there is none (too few residuals)."""
    measured = measured_coverage(level)
    if measured is None:
        return "not available: too few calibration residuals for this coverage"
    return ", ".join(f"{v:.1%}" for v in measured)


def envelope_lines(m: dict) -> list[tuple[str, str]]:
    """``kridge inspect``'s lines for the PCA shape check and the targets' ranges/bounds."""
    env, lines = m.get("envelope") or {}, []
    pca = env.get("pca")
    if pca:
        q = (f"Q limit {fmt(pca['q_limit'])}" if pca.get("q_limit") is not None
             else "no Q (nothing left off the components)")
        lines.append(("shape check", f"T² and Q on {pca['components']} components "
                      f"({pca['explained_variance']:.1%} of the variance); at {pca['level']}: "
                      f"T² limit {fmt(pca['t2_limit'])}, {q}"))
    ranges = env.get("target_ranges")
    if ranges:
        lines.append(("target ranges", ", ".join(
            f"{t} {fmt(r['min'])} … {fmt(r['max'])}" for t, r in ranges.items())))
    bounds = (m.get("target_bounds") or {}).get("bounds")
    if bounds:
        lines.append(("clipped to", ", ".join(
            f"{t} {'−∞' if b['low'] is None else fmt(b['low'])} … "
            f"{'+∞' if b['high'] is None else fmt(b['high'])}" for t, b in bounds.items())))
    return lines


def table(headers: list[str], rows: list[list], out=None) -> None:
    """Print an aligned text table."""
    out = out or sys.stdout
    cells = [[visible(str(c)) for c in headers]] + [
        ["" if c is None else visible(str(c)) for c in r] for r in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(headers))]
    for k, r in enumerate(cells):
        print("  ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)).rstrip(), file=out)
        if k == 0:
            print("  ".join("-" * w for w in widths), file=out)


def fmt(value, digits: int = 4) -> str:
    """A number as every table and summary of kridge writes it: ``digits`` significant."""
    if isinstance(value, float):
        return f"{value:.{digits}g}"
    return str(value)


def headline(metrics: dict, kind: str) -> str:
    """'hardness: RMSE 1.2, R² 0.95; gloss: …' for one metric family, or '–'."""
    part = metrics.get(kind) or {}
    bits = [
        f"{t}: RMSE {fmt(m['rmse'])}, MAE {fmt(m['mae'])}, R² {fmt(m['r2'], 3)}"
        for t, m in part.items()
    ]
    return "; ".join(bits) or "–"


#: The error families a manifest's metrics hold, each shown by the method that produced it.
ERROR_KINDS = (("loo", "LOO"), ("holdout", "holdout"), ("validation", "validation"))


def error_lines(metrics: dict) -> list[tuple[str, str]]:
    """One line per error family present, labelled by its method; holdout always shown."""
    return [(label, headline(metrics, key)) for key, label in ERROR_KINDS
            if metrics.get(key) or key == "holdout"]


def change_lines(diff: dict) -> list[tuple[str, str]]:
    """Lines of :func:`service.version_facts.changes` for ``kridge inspect MODEL A B``."""
    def span(c: dict, digits: int = 6) -> str:
        return f"{fmt(c['from'], digits)} → {fmt(c['to'], digits)}"

    lines = []
    if diff["features_added"]:
        lines.append(("features added", ", ".join(diff["features_added"])))
    if diff["features_removed"]:
        lines.append(("features removed", ", ".join(diff["features_removed"])))
    if "features_reordered" in diff:
        lines.append(("feature order", ", ".join(diff["features_reordered"]["to"])))
    for key, label in (("method", "method"), ("kernel", "kernel"), ("ridge", "ridge"),
                       ("training_rows", "training rows"), ("data_sha256", "data sha256"),
                       ("targets", "targets")):
        if key in diff:
            lines.append((label, span(diff[key])))
    for param, c in diff.get("kernel_params", {}).items():
        lines.append((f"kernel {param}", span(c)))
    for target, own in diff.get("per_target", {}).items():
        lines.append((f"kernel and ridge {target}", ", ".join(
            f"{key} {span(c)}" for key, c in own.items())))
    labels = dict((k, v) for k, v in ERROR_KINDS)
    for family, targets in diff.get("metrics", {}).items():
        for target, measures in targets.items():
            lines.append((f"{labels.get(family, family)} {target}", ", ".join(
                f"{m.upper() if m != 'r2' else 'R²'} {span(c, 4)}"
                for m, c in measures.items())))
    return lines or [("changes", "none: the two versions hold the same figures")]


def manifest_summary(m: dict, live: int | None) -> list[tuple[str, str]]:
    """Key lines of a manifest for ``kridge inspect``."""
    tr = m.get("training", {})
    env = m.get("envelope", {})
    nov = env.get("novelty", {})
    settings = target_kernels(m)
    lines = [
        ("model", f"{m['model']} v{m['version']}" + ("  (live)" if live == m["version"] else "")),
        ("created", m.get("created", "?")),
        ("features", f"{len(m['features'])}: {', '.join(m['features'])} (sha256 "
                     f"{features_hash(m['features'])})"),
        *[(f"{f} (text)", f"one-hot over {len(c)}: {', '.join(c)}")
          for f, c in (m.get("categories") or {}).items()],
        ("targets", ", ".join(m["targets"])),
        ("kernel", kernel_text(settings)),
        ("ridge", ridge_text(settings)),
        ("training rows", f"{tr.get('rows')} (holdout {tr.get('holdout_rows', 0)} rows, "
                          f"seed {tr.get('seed')}), "
                          f"data sha256 {str(tr.get('data_sha256'))[:16]}…"),
        *error_lines(m.get("metrics", {})),
    ]
    counts = tr.get("row_counts")
    if counts:
        lines.insert(7, ("data", counts.get("summary", "")))
    lm = tr.get("landmarks")
    if lm:
        lines.insert(7, ("landmarks", f"{lm['count']} ({lm['scheme']}; {lm['how_many']})"))
    solve = tr.get("solve")
    if solve:
        lines.insert(7, ("solve", solve_line(solve)))
    if tr.get("method"):
        lines.insert(7, ("method", f"{tr['method']}: {tr.get('method_reason', '')}"))
    span = env.get("time_span")
    if span:
        lines.append(("time span", f"{span['column']}: {span['start']} → {span['end']} "
                                   f"(holdout: {tr.get('holdout_kind', '')})"))
    tuning = m.get("tuning")
    if tuning:
        lines.append(("tuning", tuning.get("summary", tuning.get("method", ""))))
    if m.get("intervals"):
        lines.append(("intervals", m["intervals"]["method"]))
        cov = m["intervals"].get("holdout_coverage")
        lines.append(("holdout coverage", "; ".join(
            f"{c['nominal']:.0%} → " + coverage_text(c) for c in cov) if cov
            else "not measured"))
    lines.append(("novelty", f"k={nov.get('k')}, threshold distance "
                             f"{fmt(nov.get('threshold_distance', float('nan')))} "
                             f"({nov.get('calibration', '')})"))
    lines += envelope_lines(m)
    lines.append(("precision", precision_line(m.get("precision", "float64"),
                                              m.get("precision_check"))))
    lines += warning_lines(m)
    return lines


def warning_lines(m: dict) -> list[tuple[str, str]]:
    """One ``warning`` line per entry of the manifest's ``warnings`` (code in brackets)."""
    if "warnings" not in m:
        return [("warnings", "not recorded (a manifest from before warnings were stored)")]
    return [("warning", f"{w['message']} [{w['code']}]") for w in m["warnings"]] or [
        ("warnings", "none")]


def print_pairs(pairs: list[tuple[str, str]], out=None) -> None:
    width = max(len(k) for k, _ in pairs)
    for k, v in pairs:
        print(f"{k.ljust(width)}  {visible(str(v))}", file=out or sys.stdout)


def precision_line(precision: str, check: dict | None) -> str:
    """'float64 (exact)' or float32 with its measured largest difference per target."""
    if precision != "float32" or not check:
        return f"{precision} (exact)" if precision == "float64" else precision
    diffs = ", ".join(f"{t} {fmt(v, 2)}" for t, v in check["max_abs_error"].items())
    return (f"float32: largest difference from float64 on the {check['rows']} training rows "
            f"{diffs}")


def solve_line(solve: dict) -> str:
    """How a Nyström model's system was solved, for ``kridge inspect``."""
    if solve.get("solver") != "cg":
        return f"direct ({solve.get('reason', '')})"
    state = "converged" if solve["converged"] else "stopped at the cap"
    return (f"cg, {solve['iterations']} iterations, relative residual "
            f"{solve['final_residual']:.2g} ({state}, tolerance {solve['tolerance']:g}), "
            f"{solve['seconds']:.1f} s ({solve.get('reason', '')})")
