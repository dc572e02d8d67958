"""The training report: one self-contained HTML file per version (``report.html``).

Everything is inside the file — plots are PNG images embedded as base64 data URIs and the
style sheet is inline — so the report opens offline and can be mailed or archived as is.
Plots use matplotlib's non-interactive Agg backend (no display needed).
Names from the data are shown literally: in plots through
:func:`service.text_safety.plot_label` (no mathtext), in the HTML escaped inside ``<bdi>``
(:func:`service.text_safety.html_name`).
"""

from __future__ import annotations

import base64
import io
import math
from pathlib import Path

import numpy as np

from service.cautions import BEFORE_ACTING
from service.intervals import measured_coverage
from service.target_kernels import shared_entries, target_kernels
from service.text_safety import html_name, plot_label
from trainer.calibration import COVERAGE_LEVELS, interval_coverage
from trainer.cautions import CODE_TITLES
from trainer.report_envelope import envelope_section
from trainer.report_tables import Raw as _Raw
from trainer.report_tables import esc as _esc
from trainer.report_tables import num as _num
from trainer.report_tables import table as _table
from trainer.show import ERROR_KINDS

_STYLE = """
body{font-family:system-ui,sans-serif;max-width:60rem;margin:2rem auto;padding:0 1rem;
color:#222;line-height:1.4}
h1{font-size:1.5rem}h2{font-size:1.15rem;margin-top:2rem;border-bottom:1px solid #ccc}
table{border-collapse:collapse;margin:.5rem 0}td,th{border:1px solid #ccc;padding:.2rem .5rem;
text-align:right}th{background:#f3f3f3}td.l,th.l{text-align:left}
img{max-width:100%}.note{color:#555;font-size:.9rem}
"""


def _span_text(span: dict | None) -> str:
    """The time span as HTML (the column name isolated)."""
    if not span:
        return "– (no --time column: random holdout)"
    return html_name(span["column"]) + f": {span['start']} → {span['end']}"  # str part escaped


def _png(fig) -> str:
    """Embed a matplotlib figure as a base64 PNG <img>; closes the figure."""
    import matplotlib.pyplot as plt

    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=96, bbox_inches="tight")
    plt.close(fig)
    data = base64.b64encode(buf.getvalue()).decode("ascii")
    return f'<img alt="plot" src="data:image/png;base64,{data}">'


def _pyplot():
    import matplotlib

    matplotlib.use("Agg", force=True)
    matplotlib.rcParams["text.usetex"] = False  # a site's matplotlibrc must not make names TeX
    import matplotlib.pyplot as plt

    return plt


def _curve_plot(tuning: dict, targets: list[str]) -> str | None:
    """Tuning error (by its method) against ridge, one line per kernel parameter setting,
    one panel per kernel."""
    curves = [c for c in tuning.get("curves", []) if len(c["ridge"]) > 1]
    if not curves:
        return None
    plt = _pyplot()
    kernels = list(dict.fromkeys(c["kernel"] for c in curves))
    fig, axes = plt.subplots(1, len(kernels), figsize=(4.2 * len(kernels), 3.4), squeeze=False)
    single = len(targets) == 1
    chosen = tuning.get("chosen", {})
    for ax, name in zip(axes[0], kernels, strict=True):
        own = [c for c in curves if c["kernel"] == name]
        gammas = [c["params"].get("gamma") for c in own]
        finite = [g for g in gammas if g is not None]
        lo, hi = (min(finite), max(finite)) if finite else (1.0, 1.0)
        cmap = plt.get_cmap("viridis")
        for c, g in zip(own, gammas, strict=True):
            if single:
                err = [np.nan if r is None else r[0] for r in c["rmse"]]
            else:  # RMSE/SD averaged over targets: sqrt of the criterion
                err = [np.nan if s is None else math.sqrt(s) for s in c["score"]]
            pos = 0.5 if g is None or hi == lo else math.log(g / lo) / math.log(hi / lo)
            ax.plot(c["ridge"], err, color=cmap(pos), lw=1)
        if chosen.get("kernel") == name:
            val = chosen.get("rmse", [np.nan])[0] if single else math.sqrt(chosen["score"])
            ax.plot([chosen["ridge"]], [val], marker="*", ms=12, color="crimson",
                    label="chosen", ls="none")
            ax.legend(loc="best", fontsize=8)
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.set_xlabel("ridge λ")
        ax.set_title(f"{name}" + ("" if not finite else f" (γ {lo:.3g} → {hi:.3g}, dark → light)"),
                     fontsize=9)
    label = tuning["error_label"]
    axes[0][0].set_ylabel(f"{label} ({plot_label(targets[0])})" if single
                          else f"{label} / SD (mean)")
    fig.tight_layout()
    return _png(fig)


def _parity_and_hist(actual: np.ndarray, predicted: np.ndarray, targets: list[str]) -> str:
    plt = _pyplot()
    t = len(targets)
    fig, axes = plt.subplots(t, 2, figsize=(9, 3.6 * t), squeeze=False)
    for j, name in enumerate(targets):
        a, p = actual[:, j], predicted[:, j]
        ax = axes[j][0]
        ax.scatter(a, p, s=8, alpha=0.6)
        lo, hi = float(min(a.min(), p.min())), float(max(a.max(), p.max()))
        ax.plot([lo, hi], [lo, hi], color="k", lw=1)
        ax.set_xlabel(f"actual {plot_label(name)}")
        ax.set_ylabel(f"predicted {plot_label(name)}")
        ax.set_title("holdout: predicted against actual", fontsize=9)
        ax = axes[j][1]
        ax.hist(a - p, bins=30, color="slategray")
        ax.set_xlabel(f"residual (actual − predicted) {plot_label(name)}")
        ax.set_ylabel("rows")
        ax.set_title("holdout residuals", fontsize=9)
    fig.tight_layout()
    return _png(fig)


def _residuals_in_time(time: np.ndarray, actual: np.ndarray, predicted: np.ndarray,
                       targets: list[str], clock: bool) -> str:
    """Holdout residuals against time: drift or a change of regime shows as a trend."""
    plt = _pyplot()
    t = len(targets)
    fig, axes = plt.subplots(t, 1, figsize=(9, 2.8 * t), squeeze=False)
    x = time.astype("datetime64[s]") if clock else time
    for j, name in enumerate(targets):
        ax = axes[j][0]
        ax.plot(x, actual[:, j] - predicted[:, j], ".", ms=3, color="slategray")
        ax.axhline(0.0, color="k", lw=1)
        ax.set_ylabel(f"residual {plot_label(name)}")
        ax.set_title("holdout residuals in time order (the most recent rows)", fontsize=9)
    fig.autofmt_xdate()
    fig.tight_layout()
    return _png(fig)


def _calib_hist(calib: np.ndarray, targets: list[str], source: str) -> str:
    plt = _pyplot()
    t = len(targets)
    fig, axes = plt.subplots(1, t, figsize=(4.5 * t, 3.2), squeeze=False)
    for j, name in enumerate(targets):
        ax = axes[0][j]
        ax.hist(calib[:, j], bins=30, color="slategray")
        ax.set_xlabel(f"|{source} residual| {plot_label(name)}")
        ax.set_ylabel("rows")
    fig.tight_layout()
    return _png(fig)


def _metrics_rows(metrics: dict) -> list[list]:
    rows = []
    for kind, label in ERROR_KINDS:
        for target, m in (metrics.get(kind) or {}).items():
            rows.append([_Raw(_esc(label)), _Raw(html_name(target)), m["rmse"], m["mae"], m["r2"],
                         m["rows"]])
    return rows


def _cautions(manifest: dict) -> str:
    """The caution section: poor holdout scores, extrapolation flags, what the intervals
    promise, and review before acting."""
    items = [f"<li><b>{_esc(CODE_TITLES.get(w['code'], 'Warning'))}.</b> {_esc(w['message'])}"
             f" <code>{_esc(w['code'])}</code></li>" for w in manifest.get("warnings") or []]
    if not (manifest.get("metrics") or {}).get("holdout"):
        items.append("<li><b>No holdout.</b> Nothing scored this model on rows it did not "
                     "see; its errors on new rows are unknown.</li>")
    items.append("<li><b>Extrapolation.</b> Each prediction carries envelope flags: "
                 "<code>out_of_range</code> names the features outside their training "
                 "[min, max], <code>novel</code> marks inputs far from every training row, "
                 "<code>t2</code> and <code>q</code> above 1 mark a row whose combination or "
                 "shape the training rows never had, <code>target_out_of_range</code> a "
                 "prediction outside its target's training range; <code>flagged_by</code> "
                 "names them (see Training envelope below). A flagged prediction is an "
                 "extrapolation and may be far off, and its interval is not calibrated "
                 "there.</li>")
    intervals = manifest.get("intervals") or {}
    if intervals.get("name") == "jackknife" or str(intervals.get("method", "")).startswith(
            "jackknife"):
        items.append("<li><b>Intervals.</b> The jackknife has no finite-sample coverage "
                     "guarantee; trust the coverage measured on the holdout (Prediction "
                     "intervals below), not the nominal level.</li>")
    items.append(f"<li><b>Before acting.</b> {_esc(BEFORE_ACTING)}</li>")
    return ("<h2>Cautions</h2><ul>" + "".join(items) + "</ul>"
            "<p class=note>The holdout is judged against the training mean (and, for a time "
            "holdout, the last known value): a warning above names the baseline a target "
            "does not beat.</p>")


def _head(manifest: dict) -> list[str]:
    title = f"{_esc(manifest.get('model', ''))} v{_esc(manifest.get('version', ''))}"
    return [f"<!doctype html><html lang=en><head><meta charset=utf-8>"
            f"<title>{title} — training report</title><style>{_STYLE}</style></head><body>",
            f"<h1>{title}: training report</h1>",
            f"<p class=note>created {_esc(manifest.get('created', '?'))}</p>"]


def _data_section(manifest: dict) -> list[str]:
    tr = manifest.get("training", {})
    return ["<h2>Data</h2>", _table(["", ""], [
        [_Raw("file"), _Raw(_esc(tr.get("data_file")))],
        [_Raw("sha256"), _Raw(f"<code>{_esc(tr.get('data_sha256'))}</code>")],
        [_Raw("rows"), tr.get("rows")],
        [_Raw("rows read"), _Raw(_esc((tr.get("row_counts") or {}).get("summary", "–")))],
        [_Raw("method"), _Raw(_esc(f"{tr.get('method', 'exact')}: "
                                   f"{tr.get('method_reason', '')}"))],
        [_Raw("time span"), _Raw(_span_text(tr.get("time")))],
        [_Raw("holdout rows"), f"{tr.get('holdout_rows')} (fraction {tr.get('holdout_fraction')},"
                               f" seed {tr.get('seed')})"],
        [_Raw("features"), _Raw(", ".join(map(html_name, manifest["features"])))],
        [_Raw("targets"), _Raw(", ".join(map(html_name, manifest["targets"])))],
        [_Raw("final fit"), _Raw(_esc(tr.get("final_fit", "")))],
    ], left=2)]


def _parameters_section(manifest: dict, tuning: dict | None) -> list[str]:
    settings = target_kernels(manifest)
    rows = [[_Raw(f"kernel ({html_name(s.target)})" if len(settings) > 1 else "kernel"),
             _Raw(_esc(s.spec.describe()) + f", ridge λ = {_num(s.ridge, 6)}")]
            for s in settings]
    shared = shared_entries(settings)
    if shared["kernel"] is not None and shared["ridge"] is not None:
        rows = [[_Raw("kernel"), _Raw(_esc(settings[0].spec.describe()))],
                [_Raw("ridge λ"), _Raw(_num(settings[0].ridge, 6))]]
    if tuning:
        rows += [[_Raw("how"), _Raw(_esc(tuning.get("method", "")))],
                 [_Raw("criterion"), _Raw(_esc(tuning.get("criterion", "")))],
                 [_Raw("searched"), _Raw(_esc(", ".join(tuning.get("searched", []))))],
                 [_Raw("fallback"), _Raw(_esc(tuning.get("fallback") or "no"))],
                 [_Raw("summary"), _Raw(_esc(tuning.get("summary", "")))]]
    else:
        rows.append([_Raw("how"), _Raw("given on the command line (no tuning)")])
    out = ["<h2>Chosen parameters</h2>", _table(["", ""], rows, left=2)]
    for own in (tuning or {}).get("per_target") or [tuning]:
        out += _kernels_compared(own, (tuning or {}).get("per_target") is not None)
    return out


def _kernels_compared(tuning: dict | None, each: bool) -> list[str]:
    """The best of each kernel a search compared (one table per target tuned alone)."""
    out = []
    if tuning and len(tuning.get("per_kernel", {})) > 1:
        out.append("<p>Best of each kernel compared"
                   + (f" for {html_name(tuning['target'])}" if each else "") + ":</p>")
        out.append(_table(["kernel", "parameters", "ridge", "criterion"], [
            [_Raw(_esc(k + (f" (raced out: {v['raced_out']}, {v.get('rows')} rows)"
                                if v.get("raced_out") else ""))),
             _Raw(_esc(", ".join(f"{a}={b:.4g}" for a, b in v["params"].items()) or "–")),
             v["ridge"], v["score"]]
            for k, v in tuning["per_kernel"].items()], left=2))
    return out


def _metrics_section(manifest: dict, tuning: dict | None) -> list[str]:
    out = ["<h2>Metrics</h2>",
           _table(["kind", "target", "RMSE", "MAE", "R²", "rows"],
                  _metrics_rows(manifest.get("metrics", {})), left=2),
           "<p class=note>LOO: exact leave-one-out of the final model (all rows); "
           "holdout: scored on held-out rows by a model that never saw them; "
           "validation: the Nyström validation part, which chose the final ridge.</p>"]
    searches = [(own, [own["target"]]) for own in (tuning or {}).get("per_target") or []]
    plots = [(targets, _curve_plot(own, targets)) for own, targets in
             searches or ([(tuning, list(manifest["targets"]))] if tuning else [])]
    plots = [(targets, img) for targets, img in plots if img]
    if plots:
        out.append(f"<h2>Tuning: {_esc(tuning['error_label'])} against ridge</h2>")
        for targets, img in plots:
            out += ([f"<h3>{html_name(targets[0])}, tuned for itself</h3>"] if searches
                    else []) + [img]
        out.append("<p class=note>One line per kernel parameter setting tried; the star "
                   "marks the choice.</p>")
    return out


def _holdout_section(manifest: dict, points: dict) -> list[str]:
    targets = list(manifest["targets"])
    actual = np.asarray(points["actual"], dtype=float)
    predicted = np.asarray(points["predicted"], dtype=float)
    out = ["<h2>Holdout: parity and residuals</h2>", _parity_and_hist(actual, predicted, targets)]
    if points.get("time"):
        span = (manifest.get("training") or {}).get("time") or {}
        out += ["<h2>Holdout residuals against time</h2>",
                _residuals_in_time(np.asarray(points["time"], dtype=float), actual, predicted,
                                   targets, span.get("kind", "").startswith("ISO"))]
    return out


def _intervals_section(manifest: dict, points: dict | None,
                       calib: np.ndarray | None) -> list[str]:
    intervals = manifest.get("intervals")
    if not intervals:
        return ["<h2>Prediction intervals</h2>", "<p>No interval calibration stored.</p>"]
    targets = list(manifest["targets"])
    out = ["<h2>Prediction intervals</h2>",
           f"<p>{_esc(intervals['method'])}; {intervals['calibration_rows']} "
           "calibration residuals.</p>"]
    cov = intervals.get("holdout_coverage")
    note = intervals.get("holdout_coverage_method")
    if cov is None and calib is not None and points:
        cov = interval_coverage(calib, np.asarray(points["actual"], dtype=float),
                                np.asarray(points["predicted"], dtype=float), COVERAGE_LEVELS)
        note = ("half-widths from the stored calibration residuals (these include the "
                "holdout rows, so the check is optimistic)")
    if cov:
        rows = [_coverage_cells(t, j, c) for c in cov for j, t in enumerate(targets)]
        out += [_table(["target", "nominal", "holdout coverage", "half-width", "rows"], rows),
                f"<p class=note>{_esc(note)}</p>"]
    if calib is not None:
        out.append(_calib_hist(np.asarray(calib, dtype=float), targets,
                               intervals.get("residuals", "calibration")))
    return out


def _coverage_cells(target: str, j: int, level: dict) -> list:
    """One row of the coverage table; a level the residuals cannot give (unbounded
    half-width) says so instead of a coverage of 100 %."""
    measured = measured_coverage(level)
    if measured is None:
        gap = _Raw("not available: too few residuals")
        return [_Raw(html_name(target)), level["nominal"], gap, _Raw("unbounded"),
                level["rows"]]
    return [_Raw(html_name(target)), level["nominal"], measured[j], level["half_width"][j],
            level["rows"]]


def render(manifest: dict, tuning: dict | None, holdout_points: dict | None,
           calib: np.ndarray | None) -> str:
    """The report as one HTML string, section by section."""
    parts = [*_head(manifest), _cautions(manifest), *_data_section(manifest),
             *_parameters_section(manifest, tuning), *_metrics_section(manifest, tuning)]
    if holdout_points:
        parts += _holdout_section(manifest, holdout_points)
    parts += _intervals_section(manifest, holdout_points, calib)
    parts += envelope_section(manifest)
    parts.append("</body></html>")
    return "\n".join(parts)


def write_report(path: Path, manifest: dict, tuning: dict | None, holdout_points: dict | None,
                 calib: np.ndarray | None) -> None:
    """Write ``report.html`` for one version (called while the version is being published)."""
    Path(path).write_text(render(manifest, tuning, holdout_points, calib), encoding="utf-8")
