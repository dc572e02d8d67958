"""The comparison report: one self-contained HTML file (``kridge compare --report FILE``).

Built from the training report's parts (:mod:`trainer.report`: inline style, tables, PNG
plots embedded as data URIs), so it opens offline. Names from the data are escaped inside
``<bdi>`` in the HTML and shown literally in plots (:mod:`service.text_safety`).
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from service.text_safety import html_name, plot_label
from trainer.compare_data import LabRows
from trainer.compare_text import COMPARE_CAUTION
from trainer.report import _STYLE, _esc, _png, _pyplot, _Raw, _table


def _residual_plot(result: dict, rows: LabRows) -> str:
    """Each version's residuals (actual − predicted) against time, one panel per target."""
    plt = _pyplot()
    t = len(rows.targets)
    fig, axes = plt.subplots(t, 1, figsize=(9, 3.0 * t), squeeze=False)
    when = rows.time.astype("datetime64[s]") if rows.clock else rows.time
    for j, target in enumerate(rows.targets):
        ax = axes[j][0]
        has = ~np.isnan(rows.y[:, j])
        for s in result["versions"]:
            pred = s["predicted"].get(target)
            if pred is None:
                continue
            live = " (live)" if s["version"] == result["live"] else ""
            ax.plot(when[has], rows.y[has, j] - pred[has], ".", ms=3, alpha=0.7,
                    label=f"v{s['version']}{live}")
        ax.axhline(0.0, color="k", lw=1)
        ax.set_ylabel(f"residual {plot_label(target)}")
        ax.set_title("residuals (actual − predicted) in time order", fontsize=9)
        ax.legend(fontsize=8)
    fig.autofmt_xdate()
    fig.tight_layout()
    return _png(fig)


def _figures_rows(doc: dict, target: str) -> list[list]:
    out = []
    for s in doc["versions"]:
        f = s["targets"].get(target)
        if f is None:
            continue
        cov = "; ".join(f"{100 * c['nominal']:g} %: {_pct(c['inside_interval'])}"
                        for c in f["coverage"]) or "–"
        nov = f["novelty"]
        live = " (live)" if s["version"] == doc["live"] else ""
        out.append([_Raw(_esc(f"v{s['version']}{live}")), f["rows"], f["rmse"], f["mae"],
                    f["bias"], _Raw(_esc(cov)), _Raw(_pct(f["outside_envelope"])),
                    nov["q50"], nov["q90"], nov["q99"]])
    return out


def _pct(v) -> str:
    return "–" if v is None else f"{100 * v:.1f} %"


def _window_rows(doc: dict, target: str) -> list[list]:
    versions = [s for s in doc["versions"] if target in s["targets"]]
    out = []
    for w, span in enumerate(doc["windows"]["spans"]):
        figs = [s["targets"][target]["windows"][w] for s in versions]
        out.append([_Raw(_esc(f"{span['start']} → {span['end']}")), figs[0]["rows"]]
                   + [x for f in figs for x in (f["rmse"], f["bias"])])
    return out


def _target_section(doc: dict, target: str) -> list[str]:
    parts = [f"<h2>{html_name(target)}</h2>", _table(
        ["version", "lab values", "RMSE", "MAE", "bias", "inside served interval",
         "outside envelope", "novelty q50", "q90", "q99"], _figures_rows(doc, target), left=1)]
    if "windows" in doc:
        versions = [s for s in doc["versions"] if target in s["targets"]]
        heads = [h for s in versions for h in (f"v{s['version']} RMSE", f"v{s['version']} bias")]
        parts += [f"<p class=note>per window: {_esc(doc['windows']['rule'])}</p>",
                  _table(["window", "lab values", *heads], _window_rows(doc, target))]
    return parts


def _drift_rows(doc: dict) -> list[list]:
    out = []
    for s in doc["versions"]:
        d = s.get("drift")
        if d is None:
            out.append([_Raw(_esc(f"v{s['version']}")), None, None, _Raw("not run"), _Raw("")])
            continue
        top = max(d["features"], key=lambda f: f["mmd_drop"])["feature"]
        out.append([_Raw(_esc(f"v{s['version']}")), d["statistic"], d["p_value"],
                    _Raw(_esc(d["kernel"])), _Raw(html_name(top))])
    return out


def render(result: dict, doc: dict, rows: LabRows) -> str:
    """The report as one HTML string."""
    title = f"{_esc(doc['model'])}: comparison of versions on lab values"
    c = doc["counts"]
    parts = [f"<!doctype html><html lang=en><head><meta charset=utf-8><title>{title}</title>"
             f"<style>{_STYLE}</style></head><body>", f"<h1>{title}</h1>",
             f"<p class=note>made {_esc(doc['time'])} from {_esc(doc['data'])}</p>",
             "<h2>Cautions</h2>", f"<p>{_esc(COMPARE_CAUTION)}</p>",
             "<h2>Verdicts</h2>",
             "<ul>" + "".join(f"<li>{_esc(v['words'][0])}{html_name(v['target'])}"
                              f"{_esc(v['words'][1])}</li>" for v in doc["verdicts"])
             + "</ul>" if doc["verdicts"] else "<p>One version only: nothing to compare.</p>",
             f"<p class=note>{_esc(doc['test_method'])}</p>"]
    if doc.get("gate"):
        g = doc["gate"]
        parts.append(f"<p><b>release gate at {g['level']:g}: v{g['candidate']} "
                     f"{'passed' if g['passed'] else 'not passed'}</b> ({_esc(g['reason'])}; "
                     f"{_esc(g['rule'])})</p>")
    parts += ["<h2>Rows</h2>", f"<p>{c['rows_scored']} rows with a lab value scored of "
              f"{c['rows_read']} read: {_esc(c['summary'])}</p>"]
    for target in doc["targets"]:
        parts += _target_section(doc, target)
    parts.append(f"<p class=note>{_esc(doc['figures_method'])}</p>")
    if rows.time is not None and rows.x.shape[0]:
        parts += ["<h2>Residuals in time</h2>", _residual_plot(result, rows)]
    parts += ["<h2>Drift of the inputs</h2>",
              _table(["version", "MMD² (unbiased)", "p-value", "kernel", "feature driving most"],
                     _drift_rows(doc), left=1), "</body></html>"]
    return "\n".join(parts)


def write_report(path, result: dict, doc: dict, rows: LabRows) -> None:
    """Write the report to ``path`` through a temp file, so no half report is left."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.partial")
    try:
        tmp.write_text(render(result, doc, rows), encoding="utf-8")
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()
