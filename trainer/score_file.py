"""Offline batch predictions: a CSV in, a CSV out, streamed in chunks.

Output columns: the model's features as read, then ``<target>_predicted`` for each target,
``<target>_lower``/``<target>_upper`` when a coverage is asked, then the envelope columns of
:func:`envelope_header` / :func:`envelope_cells`: ``inside``, ``novelty``, ``out_of_range``
(feature names joined by ``;``), ``t2`` and ``q`` (empty for versions without the PCA
check), ``target_out_of_range`` (target names), ``flagged_by`` (check names), and with a
coverage ``interval_calibrated``.

Numbers are written as plain numbers; every text cell (header, ``inside``, ``out_of_range``)
is quoted and goes through :func:`service.text_safety.csv_cell`, so a name such as
``=cmd|' /C calc'!A0`` reaches a spreadsheet as text, and a ``;`` inside a name cannot start
a new cell where a spreadsheet splits on ``;``.

How many rows fell outside the training envelope is returned with the row count;
:func:`envelope_note` words it for stderr, with the caution people need before acting on
extrapolated numbers.
"""

from __future__ import annotations

import csv
import sys
from typing import NamedTuple

import numpy as np

from service.cautions import BEFORE_ACTING
from service.intervals import CoverageUnavailable
from service.model import Model
from service.text_safety import csv_cell
from trainer.errors import UserError
from trainer.read.columns import iter_chunks
from trainer.read.source import BLOCK_BYTES


def _progress(quiet: bool):
    """A rows-scored counter on a terminal (tqdm, when the trainer extras are installed)."""
    if quiet or not sys.stderr.isatty():
        return None
    try:
        from tqdm import tqdm
    except ImportError:
        return None
    return tqdm(unit=" rows", unit_scale=True, desc="scoring", file=sys.stderr)


class Scored(NamedTuple):
    """What one scoring run wrote: all rows, and those outside the training envelope."""

    rows: int
    outside: int


def envelope_note(scored: Scored) -> str:
    """Two lines for stderr: the extrapolation count and the caution that goes with it."""
    return (f"{scored.outside} of {scored.rows} rows outside the training envelope: "
            f"extrapolations\nCaution: {BEFORE_ACTING}")


def envelope_header(intervals: bool) -> list[str]:
    """The envelope's column names, after the numbers (:func:`envelope_cells` fills them)."""
    names = ["inside", "novelty", "out_of_range", "t2", "q", "target_out_of_range",
             "flagged_by"]
    return names + ["interval_calibrated"] if intervals else names


def envelope_cells(e: dict, intervals: bool) -> list:
    """One row's envelope cells in :func:`envelope_header` order: numbers as numbers, names
    joined by ``;`` and made spreadsheet-safe, a check the version lacks left empty."""
    cells = ["true" if e["inside"] else "false", e["novelty"],
             ";".join(csv_cell(f) for f in e["out_of_range"]),
             e.get("t2", ""), e.get("q", ""),
             ";".join(csv_cell(t) for t in e.get("target_out_of_range") or ()),
             ";".join(e["flagged_by"])]
    if intervals:
        cells.append("true" if e["inside"] else "false")
    return cells


def score_csv(model: Model, path, out, coverage: float | None = None, quiet: bool = False,
              block_bytes: int = BLOCK_BYTES) -> Scored:
    """Write predictions for every row of ``path`` to the text stream ``out``."""
    half = None
    if coverage is not None:
        try:
            half = model.half_width(coverage)
        except CoverageUnavailable as exc:  # the rule the HTTP service refuses by too
            raise UserError(str(exc)) from None
        except ValueError as exc:  # outside (0, 1)
            raise UserError(f"--{exc}") from None
    chunks = iter_chunks(path, model.features, block_bytes=block_bytes)  # refuses a bad file first
    writer = csv.writer(out, lineterminator="\n", quoting=csv.QUOTE_NONNUMERIC)
    header = list(model.features) + [f"{t}_predicted" for t in model.targets]
    if half is not None:
        for t in model.targets:
            header += [f"{t}_lower", f"{t}_upper"]
    intervals = half is not None
    writer.writerow([csv_cell(h) for h in header] + envelope_header(intervals))
    bar = _progress(quiet)
    total = outside = 0
    for _start, x in chunks:
        if not x.shape[0]:
            continue
        y, env, lower, upper = model.answer(x, half)
        cols = [x, y]
        if intervals:
            bounds = np.empty((y.shape[0], 2 * y.shape[1]))
            bounds[:, 0::2] = lower
            bounds[:, 1::2] = upper
            cols.append(bounds)
        numbers = np.hstack(cols)
        for row, e in zip(numbers, env, strict=True):
            # floats: unquoted, written with repr
            writer.writerow(row.tolist() + envelope_cells(e, intervals))
        total += x.shape[0]
        outside += sum(not e["inside"] for e in env)
        if bar is not None:
            bar.update(x.shape[0])
    if bar is not None:
        bar.close()
    return Scored(total, outside)
