"""``kridge compare --pairs``: the live and shadow predictions as served, set against lab values.

The pairs file (``KRIDGE_SHADOW_PAIRS``) holds one JSON object per shadowed row: its ``id``
(the caller's row id), ``model``, ``live_version``, ``shadow_version``, ``time`` (when the
live answer was made), ``inputs``, ``live`` and ``shadow`` (a number, or one per target in
the model's target order). Rows of the named model and one (live, shadow) pair of versions
are joined on ``id`` to the lab file's id column; the predictions are taken from the file,
not recomputed, and scored with the figures and the Diebold–Mariano verdict of
:mod:`trainer.compare` (rows in the order they were served, so the Newey–West variance).
Ids without a partner on either side are counted; an id twice in either file is refused.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import datetime

import numpy as np
import orjson

from service.text_safety import visible
from trainer.compare import verdicts
from trainer.compare_data import LabRows
from trainer.compare_stats import error_figures
from trainer.errors import UserError
from trainer.read.source import Source


@dataclass
class Pair:
    line: int
    time: float
    inputs: list[float]
    live: list[float]
    shadow: list[float]


def _id_text(cell) -> str | None:
    """A lab file's id cell as the text a request carries (integral floats without .0)."""
    if cell is None or (isinstance(cell, float) and not math.isfinite(cell)):
        return None
    if isinstance(cell, float) and cell.is_integer():
        return str(int(cell))
    text = str(cell)  # as written: the pairs' ids are compared as the requests sent them
    return text if text.strip() else None


def _values(obj, n: int, where: str, field: str) -> list[float]:
    vals = obj if isinstance(obj, list) else [obj]
    if len(vals) != n or not all(isinstance(v, int | float) and not isinstance(v, bool)
                                 for v in vals):
        raise UserError(f"{where}: {field!r} must hold {n} number(s), one per target")
    return [float(v) for v in vals]


def read_pairs(path: str, model: str, n_targets: int, versions: tuple[int, int] | None
               ) -> tuple[tuple[int, int], dict[str, Pair], dict]:
    """The pairs of ``model`` by row id, their (live, shadow) versions and counts.

    ``versions``: keep that (live, shadow) pair; None: the file must hold only one."""
    by_versions: dict[tuple[int, int], dict[str, Pair]] = {}
    other_models = no_id = 0
    try:
        fh = open(path, "rb")  # noqa: SIM115 (read line by line below)
    except OSError as exc:
        raise UserError(f"--pairs {path}: cannot be read: {exc.strerror}") from None
    with fh:
        for n, raw in enumerate(fh, start=1):
            if not raw.strip():
                continue
            where = f"{path}: line {n}"
            try:
                p = orjson.loads(raw)
            except orjson.JSONDecodeError:
                raise UserError(f"{where}: not a JSON object") from None
            if not isinstance(p, dict):
                raise UserError(f"{where}: not a JSON object")
            if p.get("model") != model:
                other_models += 1
                continue
            missing = [k for k in ("id", "live_version", "shadow_version", "time", "inputs",
                                   "live", "shadow") if k not in p]
            if missing:
                raise UserError(f"{where}: no field {', '.join(map(repr, missing))}")
            if p["id"] is None:
                no_id += 1
                continue
            key = (p["live_version"], p["shadow_version"])
            if not all(type(v) is int for v in key):
                raise UserError(f"{where}: live_version and shadow_version must be integers")
            try:
                when = datetime.fromisoformat(p["time"]).timestamp()
            except (TypeError, ValueError):
                raise UserError(f"{where}: 'time' is not an ISO 8601 time") from None
            if not isinstance(p["inputs"], dict):
                raise UserError(f"{where}: 'inputs' must be an object")
            rid = str(p["id"])
            rows = by_versions.setdefault(key, {})
            if rid in rows:
                raise UserError(f"{path}: row id {visible(rid)!r} is on lines "
                                f"{rows[rid].line} and {n}; ids must be unique to be joined")
            rows[rid] = Pair(n, when, list(p["inputs"].values()),
                             _values(p["live"], n_targets, where, "live"),
                             _values(p["shadow"], n_targets, where, "shadow"))
    if not by_versions:
        raise UserError(f"{path}: no row of model {visible(model)!r} with a row id")
    found = ", ".join(f"live v{a} / shadow v{b}" for a, b in sorted(by_versions))
    if versions is None:
        if len(by_versions) > 1:
            raise UserError(f"{path}: rows of several version pairs ({found}); choose one "
                            "with --versions LIVE,SHADOW")
        versions = next(iter(by_versions))
    if versions not in by_versions:
        raise UserError(f"{path}: no rows of live v{versions[0]} / shadow v{versions[1]}; "
                        f"the file has {found}")
    counts = {"pairs_other_models": other_models, "pairs_without_id": no_id,
              "pairs_other_versions": sum(len(r) for k, r in by_versions.items()
                                          if k != versions)}
    return versions, by_versions[versions], counts


def read_lab_by_id(path: str, id_col: str, targets: list[str], sep: str | None,
                   decimal: str | None) -> tuple[list[str], dict[str, np.ndarray], dict]:
    """Lab values by row id: the targets present, id → values (NaN: none), counts."""
    src = Source(path, sep, decimal)
    src.check_columns([id_col], "id column")
    present = [t for t in targets if t in src.header]
    if not present:
        raise UserError(f"{src.path}: no lab value column; the model's targets are "
                        f"{', '.join(map(repr, targets))}")
    out: dict[str, np.ndarray] = {}
    lines: dict[str, str] = {}
    read = no_id = no_value = 0
    for chunk in src.chunks(present, cells=[id_col]):
        for i, cell in enumerate(chunk.cells[0]):
            rid = _id_text(cell)
            y = chunk.values[i]
            if rid is None:
                no_id += 1
            elif np.isnan(y).all():
                no_value += 1
            elif rid in out:
                raise UserError(f"{src.where(chunk.block, i, read)}: row id {visible(rid)!r} "
                                f"again (first at {lines[rid]}); ids must be unique")
            else:
                out[rid] = y.copy()
                lines[rid] = src.where(chunk.block, i, read).rsplit(": ", 1)[-1]
        read += chunk.values.shape[0]
    counts = {"lab_rows_read": read, "lab_rows_without_id": no_id,
              "lab_rows_without_value": no_value}
    return present, out, counts


def join(pairs: dict[str, Pair], lab: dict[str, np.ndarray], model_targets: list[str],
         present: list[str], features: list[str]) -> tuple[LabRows, np.ndarray, np.ndarray]:
    """The matched rows in the order served: LabRows and the live and shadow predictions
    (columns: ``present``)."""
    ids = sorted(set(pairs) & set(lab), key=lambda r: (pairs[r].time, pairs[r].line))
    cols = [model_targets.index(t) for t in present]
    t = len(present)
    y = np.array([lab[r] for r in ids], dtype=np.float64).reshape(len(ids), t)
    live = np.array([pairs[r].live for r in ids], dtype=np.float64).reshape(len(ids), -1)
    shadow = np.array([pairs[r].shadow for r in ids], dtype=np.float64).reshape(len(ids), -1)
    x = np.array([pairs[r].inputs for r in ids], dtype=object).reshape(len(ids), -1)
    rows = LabRows(features, present, x, y, np.array([pairs[r].time for r in ids]), x,
                   clock=True)
    rows.counts = {"matched": len(ids), "pairs_unmatched": len(set(pairs) - set(lab)),
                   "lab_unmatched": len(set(lab) - set(pairs))}
    return rows, live[:, cols], shadow[:, cols]


def compare_served(rows: LabRows, live: np.ndarray, shadow: np.ndarray,
                   versions: tuple[int, int], level: float) -> dict:
    """Figures per version and target, and the verdict of the shadow against the live."""
    scored = []
    for v, pred in zip(versions, (live, shadow), strict=True):
        s = {"version": v, "targets": {}, "predicted": {}}
        for j, target in enumerate(rows.targets):
            has = ~np.isnan(rows.y[:, j])
            s["targets"][target] = error_figures(rows.y[has, j], pred[has, j])
            s["predicted"][target] = pred[:, j]
        scored.append(s)
    return {"live": versions[0], "shadow": versions[1], "baseline": versions[0],
            "level": level, "versions": scored,
            "verdicts": verdicts(scored, rows, versions[0], level, versions[0])}


FIGURES_METHOD = ("predictions as served (the pairs file), joined on row id to the lab "
                  "values; residual = actual − predicted; rmse = √mean residual², mae = mean "
                  "|residual|, bias = mean residual (> 0: predicts too low); rows in the "
                  "order the live answers were made")
TEST_METHOD = ("Diebold–Mariano test (Diebold & Mariano 1995) of squared errors, d = live "
               "residual² − shadow residual², on the matched rows in the order served; "
               "DM = mean(d) / √(V/n), two-sided normal p-value; V = Newey–West long-run "
               "variance, Bartlett weights, lag ⌊4 (n/100)^(2/9)⌋")


def as_text(doc: dict) -> str:
    """The terminal summary of a served comparison."""
    c = doc["counts"]
    out = [f"{visible(doc['model'])}: live v{doc['live']} and shadow v{doc['shadow']} as "
           f"served, {c['matched']} row ids matched ({c['pairs_unmatched']} served rows "
           f"without a lab value, {c['lab_unmatched']} lab rows not in the pairs file)"]
    for target in doc["targets"]:
        out.append(f"  {visible(target)}:  {'version':<10} {'rows':>5} {'RMSE':>10} "
                   f"{'MAE':>10} {'bias':>10}")
        for s in doc["versions"]:
            f = s["targets"][target]
            role = "live" if s["version"] == doc["live"] else "shadow"
            out.append(f"  {'':{len(visible(target)) + 1}}  {role + ' v' + str(s['version']):<10}"
                       f" {f['rows']:>5} " + " ".join(
                           f"{v:>10.4g}" if v is not None else f"{'–':>10}"
                           for v in (f["rmse"], f["mae"], f["bias"])))
    out += [v["text"] for v in doc["verdicts"]]
    return "\n".join(out)
