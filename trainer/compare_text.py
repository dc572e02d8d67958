"""``kridge compare`` in words: the terminal summary, the JSON document, the record line.

Names from the data are shown through :func:`service.text_safety.visible` (escaped).
"""

from __future__ import annotations

import math

from service.cautions import BEFORE_ACTING, DRIFT_ALARM
from service.text_safety import visible
from trainer.compare_stats import MIN_LAB_VALUES

#: The caution every comparison carries (text, JSON, report).
COMPARE_CAUTION = (
    f"A comparison on few lab values is weak evidence (below {MIN_LAB_VALUES} per target the "
    "verdict says so); lab values are themselves measured with error, and a version that wins "
    "on recent rows can still fail where no lab value was taken. " + DRIFT_ALARM + " "
    + BEFORE_ACTING)


def _f(value, digits: int = 4) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "–"
    return f"{value:.{digits}g}"


def _signed(value, digits: int = 4) -> str:
    return _f(value, digits) if value is None or not math.isfinite(value) else \
        f"{value:+.{digits}g}"


def _version_label(v: int, result: dict) -> str:
    return f"v{v}" + ("*" if v == result["live"] else "")


def _target_table(result: dict, target: str) -> list[str]:
    first = next(s for s in result["versions"] if target in s["targets"])
    levels = [c["nominal"] for c in first["targets"][target]["coverage"]]
    head = (f"  {'version':<8} {'rows':>5} {'RMSE':>9} {'MAE':>9} {'bias':>9} "
            + "".join(f"{f'in {100 * c:g}%':>8}" for c in levels)
            + f" {'outside':>8} {'novelty q50/q90/q99':>20}")
    lines = [f"{visible(target)}", head]
    for s in result["versions"]:
        f = s["targets"].get(target)
        if f is None:
            lines.append(f"  {_version_label(s['version'], result):<8} (no such target)")
            continue
        cov = {c["nominal"]: c["inside_interval"] for c in f["coverage"]}
        nov = f["novelty"]
        lines.append(
            f"  {_version_label(s['version'], result):<8} {f['rows']:>5} {_f(f['rmse']):>9} "
            f"{_f(f['mae']):>9} {_signed(f['bias']):>9} "
            + "".join(f"{_pct(cov.get(c)):>8}" for c in levels)
            + f" {_pct(f['outside_envelope']):>8} "
            f"{'/'.join(_f(nov[k], 3) for k in ('q50', 'q90', 'q99')):>20}")
    return lines


def _pct(value) -> str:
    return "–" if value is None or not math.isfinite(value) else f"{100 * value:.1f}%"


def _window_lines(result: dict, target: str) -> list[str]:
    spans = result["windows"]["spans"]
    versions = [s for s in result["versions"] if target in s["targets"]]
    head = f"  {'window':<42} {'rows':>5}" + "".join(
        f" {_version_label(s['version'], result) + ' RMSE':>10} "
        f"{_version_label(s['version'], result) + ' bias':>10}" for s in versions)
    lines = [f"  {visible(target)} per window ({result['windows']['rule']}; a window of fewer "
             f"than {MIN_LAB_VALUES} lab values is weak):", head]
    for w, span in enumerate(spans):
        figs = [s["targets"][target]["windows"][w] for s in versions]
        lines.append(f"  {span['start'] + ' → ' + span['end']:<42} {figs[0]['rows']:>5}"
                     + "".join(f" {_f(f['rmse']):>10} {_signed(f['bias']):>10}" for f in figs))
    return lines


def drift_line(s: dict, result: dict) -> str:
    d = s.get("drift")
    label = _version_label(s["version"], result)
    if d is None:
        return f"  {label}: not run (fewer than 2 rows with complete inputs)"
    found = "drift: the inputs differ from its training rows" if d["p_value"] < 0.05 else \
        "no drift detected"
    top = max(d["features"], key=lambda f: f["mmd_drop"])["feature"] if d["features"] else "–"
    return (f"  {label}: MMD² {d['statistic']:.4g}, p = {d['p_value']:.3g} "
            f"({d['permutations']} permutations): {found} at level 0.05; most: {visible(top)}")


def as_text(result: dict, gate: dict | None) -> str:
    """The terminal summary of a comparison (and of the gate, when asked)."""
    c = result["counts"]
    lines = [f"{result['model']}: {c['rows_scored']} rows with a lab value scored (of "
             f"{c['rows_read']} read; {visible(c['summary'])}"
             + (f"; {c['rows_dropped_incomplete']} left out for a missing input"
                if c["rows_dropped_incomplete"] else "")
             + (f"; since {visible(c['since'])}" if c.get("since") else "") + ")",
             f"baseline: {_version_label(result['baseline'], result)}  (* = live)", ""]
    for target in result["targets"]:
        lines += _target_table(result, target)
        if "windows" in result:
            lines += _window_lines(result, target)
        lines.append("")
    lines.append("drift of the inputs against each version's training rows (kernel two-sample "
                 "test):")
    lines += [drift_line(s, result) for s in result["versions"]]
    lines += ["", "verdicts (Diebold–Mariano test of squared errors):"]
    lines += [f"  {visible(v['text'])}" for v in result["verdicts"]] or \
        ["  (one version only: nothing to compare)"]
    if gate is not None:
        word = "passed" if gate["passed"] else "NOT passed"
        lines += ["", f"--require-better {gate['level']:g}: v{gate['candidate']} {word} "
                  f"({visible(gate['reason'])}); rule: {gate['rule']}"]
    lines += ["", "bias = mean of (actual − predicted): positive means the version predicts "
              "too low; in N% = share of lab values inside the served N % interval; outside = "
              "share of rows outside the training envelope",
              f"Caution: {COMPARE_CAUTION}"]
    return "\n".join(lines)


def record_text(records: list[dict]) -> str:
    """What ``kridge versions`` shows of the comparisons on record for a version."""
    if not records:
        return ""
    last = records[-1]
    if "fault" in last:
        return f"{len(records)} (last unreadable)"
    gate = last.get("gate") or {}
    word = "" if not gate else (" passed" if gate.get("passed") else " not passed")
    return f"{len(records)} (last vs v{last.get('baseline', '?')}{word}, {last.get('time', '?')})"
