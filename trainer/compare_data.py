"""The rows ``kridge compare`` scores: new inputs with the lab values measured for them.

Read through the training reader (:class:`trainer.read.source.Source`: every CSV dialect,
Parquet, Excel; ``--sep``/``--decimal``). Lab values are sparse: a row counts for a target
when that target's cell holds a number, and rows without any target value are counted and
left out of the error figures (their inputs still go to the drift test). A missing input on
a row that has a lab value is refused with its line and column unless ``drop_incomplete``
leaves it out (counted). With a time column, rows are put in time order and cut into
windows (:func:`window_index`).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field

import numpy as np

from service.text_safety import name_refusal
from trainer.errors import UserError
from trainer.read.columns import is_clock
from trainer.read.source import Source, parse_time_text

#: Windows when the time column holds plain numbers and no ``--window`` is given.
EQUAL_COUNT_WINDOWS = 5
#: Window length when the time column holds timestamps and no ``--window`` is given.
DEFAULT_WINDOW = "7d"
_UNITS = {"m": 60.0, "h": 3600.0, "d": 86400.0, "w": 604800.0}
_SPAN = re.compile(r"^\s*([0-9]*\.?[0-9]+)\s*([mhdw]?)\s*$")


@dataclass
class LabRows:
    """Inputs ``x`` (n, d) in ``features`` order, lab values ``y`` (n, t; NaN: none) of
    ``targets``, times (n,) or None, in time order when timed; ``inputs``: every row with
    complete inputs (for the drift test), lab value or not."""

    features: list[str]
    targets: list[str]
    x: np.ndarray
    y: np.ndarray
    time: np.ndarray | None
    inputs: np.ndarray
    clock: bool = False
    counts: dict = field(default_factory=dict)


def _refuse(src: Source, chunk, row: int, first: int, column: str, hint: str = "") -> None:
    raise UserError(f"{src.where(chunk.block, row, first)}, column {column!r}: missing "
                    f"value{hint}")


def read_lab_rows(path, features: list[str], targets: list[str], time: str | None = None,
                  sep: str | None = None, decimal: str | None = None,
                  drop_incomplete: bool = False, since: str | None = None,
                  time_format: str | None = None) -> LabRows:
    """Read the file at ``path`` (module docstring). ``targets``: the versions' targets;
    those absent from the file are dropped (at least one must be there). ``since``: keep
    rows at or after this time (needs ``time``)."""
    src = Source(path, sep, decimal)
    src.check_columns(features, "feature column")
    present = [t for t in targets if t in src.header]
    if not present:
        raise UserError(f"{src.path}: no lab value column; the versions' targets are "
                        f"{', '.join(map(repr, targets))}")
    if time is not None:
        src.settle_time(time, time_format)  # ISO 8601, numbers, or written dates
    refusal = name_refusal([*features, *present, *([time] if time else [])], src.header)
    if refusal:
        raise UserError(f"{src.path}: {refusal}")
    d = len(features)
    xs, ys, ts, inputs, input_ts = [], [], [], [], []
    read = dropped = 0
    for chunk in src.chunks(features + present, time):
        v = chunk.values
        has_lab = ~np.isnan(v[:, d:]).all(axis=1)
        gaps = np.isnan(v[:, :d])
        bad = has_lab & gaps.any(axis=1)
        tgap = (has_lab & np.isnan(chunk.time)) if chunk.time is not None else None
        if not drop_incomplete and bad.any():
            i = int(np.flatnonzero(bad)[0])
            _refuse(src, chunk, i, read, features[int(np.flatnonzero(gaps[i])[0])],
                    " (give --drop-incomplete to leave such rows out)")
        if tgap is not None and tgap.any():
            _refuse(src, chunk, int(np.flatnonzero(tgap)[0]), read, time)
        keep = has_lab & ~bad
        complete = ~gaps.any(axis=1)
        inputs.append(v[complete, :d])
        if chunk.time is not None:
            input_ts.append(chunk.time[complete])
        xs.append(v[keep, :d])
        ys.append(v[keep, d:])
        if chunk.time is not None:
            ts.append(chunk.time[keep])
        read += v.shape[0]
        dropped += int(bad.sum())
    x = np.concatenate(xs) if xs else np.empty((0, d))
    y = np.concatenate(ys) if ys else np.empty((0, len(present)))
    t = np.concatenate(ts) if time else None
    clock = bool(time) and is_clock(src, time)
    rows = LabRows(features, present, x, y, t, np.concatenate(inputs) if inputs else x, clock)
    if t is not None:
        rows = _in_time_order(rows, since, np.concatenate(input_ts))
    elif since is not None:
        raise UserError("--since needs --time (the column the time is read from)")
    rows.counts = _counts(read, dropped, rows, since)
    if rows.x.shape[0] == 0:
        raise UserError(f"{src.path}: no row has a lab value for {', '.join(map(repr, present))}"
                        + (f" at or after {since}" if since else "") + f" ({read} rows read)")
    return rows


def _in_time_order(rows: LabRows, since: str | None, input_times: np.ndarray) -> LabRows:
    """The lab rows sorted by time; with ``since``, only the rows (and the inputs for the
    drift test) at or after it (inputs without a time then drop out)."""
    order = np.argsort(rows.time, kind="stable")
    x, y, t, inputs = rows.x[order], rows.y[order], rows.time[order], rows.inputs
    if since is not None:
        try:
            start = parse_time_text(since)
        except ValueError:
            raise UserError(f"--since {since!r} is neither an ISO 8601 time nor a number"
                            ) from None
        keep = t >= start
        x, y, t = x[keep], y[keep], t[keep]
        inputs = inputs[input_times >= start]  # NaN (no time) compares False: left out
    return LabRows(rows.features, rows.targets, x, y, t, inputs, rows.clock)


def _counts(read: int, dropped: int, rows: LabRows, since: str | None) -> dict:
    per = {name: int((~np.isnan(rows.y[:, j])).sum()) for j, name in enumerate(rows.targets)}
    return {"rows_read": read, "rows_scored": int(rows.x.shape[0]),
            "rows_dropped_incomplete": dropped, "since": since, "lab_values": per,
            "summary": "; ".join(f"{n} of {read} rows have a value for {t}"
                                 for t, n in per.items())}


def parse_window(text: str | None, clock: bool) -> float | None:
    """``--window``: a length in seconds for timestamps ("7d", "12h", "2w", "90m"; a bare
    number is days), the column's own units for plain-number times; None: the default."""
    if text is None:
        return _UNITS["d"] * 7 if clock else None
    m = _SPAN.match(text)
    if not m or float(m.group(1)) <= 0 or (m.group(2) and not clock):
        unit = "a positive length such as 7d, 12h, 2w or 90m" if clock else \
            "a positive number in the time column's units"
        raise UserError(f"--window must be {unit}, not {text!r}")
    return float(m.group(1)) * (_UNITS[m.group(2) or "d"] if clock else 1.0)


def window_index(time: np.ndarray, length: float | None) -> np.ndarray:
    """Window number of each time (ascending ``time``): ⌊(t − t₀) / length⌋ from the first
    time t₀; with ``length`` None, :data:`EQUAL_COUNT_WINDOWS` windows of equal row counts
    (as near as the count allows) in time order. Empty windows are skipped: the numbers are
    renumbered 0, 1, … in order."""
    n = time.size
    if n == 0:
        return np.zeros(0, dtype=int)
    if length is None:
        raw = (np.arange(n) * min(EQUAL_COUNT_WINDOWS, n)) // n
    else:
        raw = np.floor((time - time[0]) / length).astype(int)
    _, index = np.unique(raw, return_inverse=True)
    return index.reshape(-1)


def window_rule(length: float | None, clock: bool) -> str:
    """The stated rule behind :func:`window_index`."""
    if length is None:
        return (f"{EQUAL_COUNT_WINDOWS} windows of equal row counts in time order (plain-number "
                "time column, no --window)")
    span = f"{length / 86400:g} days" if clock else f"{length:g} (time column units)"
    return f"consecutive windows of {span} from the first scored row's time"


def time_text(value: float, clock: bool) -> str:
    """A time for people: ISO 8601 UTC for timestamps, the number otherwise."""
    if not clock or not math.isfinite(value):
        return f"{value:g}"
    return str(np.datetime64(int(round(value)), "s")) + "Z"
