"""Offline batch predictions: a file of rows in (CSV, Parquet, Excel), a CSV out, in chunks.

Output columns, in order: the ``--keep`` columns as the file holds them (identifiers, time
stamps, anything: copied, never parsed), the model's features as read (only with
``with_inputs``), ``<target>_predicted`` for each target, ``<target>_lower``/``<target>_upper``
when a coverage is asked, the envelope columns (:mod:`trainer.score_columns`), and with
``drop_incomplete`` a ``skipped`` column naming why a row has no results.

The output is written in the input's dialect (:mod:`trainer.score_columns`). A refusal (a
bad cell, a missing value without ``drop_incomplete``) raises before the caller's output is
made visible: the caller writes to a temporary file (:func:`trainer.predict_command.run`).

How many rows fell outside the training envelope, and how many were skipped, is returned
with the row count; :func:`envelope_note` words it for stderr, with the caution people need
before acting on extrapolated numbers.
"""

from __future__ import annotations

import sys
from dataclasses import dataclass, field
from typing import NamedTuple, TextIO

import numpy as np

from service.cautions import BEFORE_ACTING
from service.intervals import CoverageUnavailable
from service.model import Model
from service.text_safety import csv_cell
from trainer.errors import UserError
from trainer.read.cells import is_missing
from trainer.read.source import BLOCK_BYTES, Source
from trainer.score_columns import CALIBRATED, ENVELOPE_COLUMNS, Dialect, envelope_cells, quoted

#: The column that says why a row has no results (with ``drop_incomplete``).
SKIPPED = "skipped"


def _progress(quiet: bool):
    """A rows-scored counter on a terminal (tqdm, when the trainer extras are installed)."""
    if quiet or not sys.stderr.isatty():
        return None
    try:
        from tqdm import tqdm
    except ImportError:
        return None
    return tqdm(unit=" rows", unit_scale=True, desc="scoring", file=sys.stderr)


@dataclass
class ScoreOptions:
    """What to write besides the predictions, and how the input is read."""

    coverage: float | None = None
    keep: list[str] = field(default_factory=list)
    with_inputs: bool = False
    drop_incomplete: bool = False
    sep: str | None = None  # CSV input: its separator; Parquet/Excel: the output's
    decimal: str | None = None


class Scored(NamedTuple):
    """What one scoring run wrote: all rows, those outside the envelope, those skipped."""

    rows: int
    outside: int
    skipped: int = 0


def envelope_note(scored: Scored) -> str:
    """Lines for stderr: skipped rows, the extrapolation count and the caution with it."""
    skipped = (f"{scored.skipped} of {scored.rows} rows skipped for a missing input (empty "
               f"results; column {SKIPPED!r} says which input)\n" if scored.skipped else "")
    return (f"{skipped}{scored.outside} of {scored.rows - scored.skipped} rows outside the "
            f"training envelope: extrapolations\nCaution: {BEFORE_ACTING}")


def output_dialect(src: Source, opts: ScoreOptions) -> Dialect:
    """The input's dialect for a CSV; for Parquet/Excel ``,`` and ``.`` unless told."""
    if src.kind == "csv":
        return Dialect(src.sep, src.decimal)
    decimal = opts.decimal or "."
    sep = opts.sep or (";" if decimal == "," else ",")
    if len(sep) != 1 or sep == decimal or sep in '"\r\n':
        raise UserError(f"--sep {sep!r} cannot separate cells written with the decimal mark "
                        f"{decimal!r}")
    return Dialect(sep, decimal)


def result_columns(model: Model, half) -> list[str]:
    names = [f"{t}_predicted" for t in model.targets]
    if half is not None:
        for t in model.targets:
            names += [f"{t}_lower", f"{t}_upper"]
    return names + list(ENVELOPE_COLUMNS) + ([CALIBRATED] if half is not None else [])


def _half_width(model: Model, coverage: float | None):
    if coverage is None:
        return None
    try:
        return model.half_width(coverage)
    except CoverageUnavailable as exc:  # the rule the HTTP service refuses by too
        raise UserError(str(exc)) from None
    except ValueError as exc:  # outside (0, 1)
        raise UserError(f"--{exc}") from None


def _columns(src: Source, model: Model, opts: ScoreOptions, half) -> tuple[list[str], list[str]]:
    """(header, inputs written): checks the file's columns and the names asked to keep."""
    missing = [c for c in model.features if c not in src.header]
    if missing:
        raise UserError(f"{src.path}: missing feature column(s) {', '.join(map(repr, missing))}")
    if len(set(opts.keep)) != len(opts.keep):
        raise UserError(f"--keep lists a column twice: {', '.join(opts.keep)}")
    src.check_columns(opts.keep, "kept column")
    inputs = [f for f in model.features if f not in opts.keep] if opts.with_inputs else []
    results = result_columns(model, half) + ([SKIPPED] if opts.drop_incomplete else [])
    clash = [k for k in opts.keep if k in results]
    if clash:
        raise UserError(f"--keep {clash[0]!r}: the output has a result column of that name")
    return [*opts.keep, *inputs, *results], inputs


def score_file(model: Model, path, out: TextIO, opts: ScoreOptions | None = None,
               quiet: bool = False, block_bytes: int = BLOCK_BYTES) -> Scored:
    """Write predictions for every row of ``path`` to the text stream ``out``.

    Everything is checked before the first byte: the coverage, the columns, the names to
    keep. A bad cell found later raises :class:`UserError` with its line and column, after
    part of the output was written: ``out`` must be a temporary file the caller discards.
    """
    opts = opts or ScoreOptions()
    half = _half_width(model, opts.coverage)
    src = Source(path, opts.sep, opts.decimal)
    dialect = output_dialect(src, opts)
    header, inputs = _columns(src, model, opts, half)
    out.write(dialect.line([quoted(csv_cell(h)) for h in header]))
    where = [model.features.index(f) for f in inputs]
    text = [f for f in model.features if model.encoding.is_text(f)]
    numbers = [f for f in model.features if f not in text]
    asked = list(dict.fromkeys(opts.keep + text))
    bar = _progress(quiet)
    total = outside = skipped = 0
    for chunk in src.chunks(numbers, block_bytes=block_bytes, cells=asked or None):
        cells_of = dict(zip(asked, chunk.cells or [], strict=True))
        x, gap = _inputs(model, chunk.values, numbers, cells_of)
        incomplete = gap.any(axis=1)
        if incomplete.any() and not opts.drop_incomplete:
            i, j = np.argwhere(gap)[0]
            raise UserError(f"{src.where(chunk.block, int(i), total)}, column "
                            f"{model.features[j]!r}: missing value (give --drop-incomplete "
                            "to skip such rows: they are written with empty results)")
        results, out_count = _result_cells(model, dialect, x[~incomplete], half)
        reasons = iter(_reason(model.features, row) for row in gap[incomplete])
        answers = iter(results)
        kept = [cells_of[k] for k in opts.keep]
        tail = [""] if opts.drop_incomplete else []
        blank = [""] * (len(header) - len(kept) - len(inputs) - 1)
        for i in range(x.shape[0]):
            cells = [dialect.kept(col[i]) for col in kept]
            cells += [dialect.kept(v) if isinstance(v, str) else dialect.number(v)
                      for v in x[i, where].tolist()]
            cells += blank + [next(reasons)] if incomplete[i] else next(answers) + tail
            out.write(dialect.line(cells))
        total += x.shape[0]
        skipped += int(incomplete.sum())
        outside += out_count
        if bar is not None:
            bar.update(x.shape[0])
    if bar is not None:
        bar.close()
    return Scored(total, outside, skipped)


def _inputs(model: Model, values: np.ndarray, numbers: list[str], cells: dict
            ) -> tuple[np.ndarray, np.ndarray]:
    """(raw inputs (m, d) in the model's feature order, (m, d) missing mask). Without text
    features the reader's float array itself; with them an object array holding each
    text feature's cell as text (None: missing)."""
    if not model.encoding.any:
        return values, np.isnan(values)
    m = values.shape[0]
    raw = np.empty((m, len(model.features)), dtype=object)
    gap = np.zeros(raw.shape, dtype=bool)
    k = 0
    for j, f in enumerate(model.features):
        if f in numbers:
            raw[:, j] = values[:, k]
            gap[:, j] = np.isnan(values[:, k])
            k += 1
        else:
            for i, cell in enumerate(cells[f]):
                gap[i, j] = is_missing(cell)
                raw[i, j] = None if gap[i, j] else str(cell)
    return raw, gap


def _result_cells(model: Model, dialect: Dialect, x: np.ndarray, half
                  ) -> tuple[list[list[str]], int]:
    """Prediction, bound and envelope cells of complete rows, and how many are outside."""
    if not x.shape[0]:
        return [], 0
    y, env, lower, upper = (model.answer_rows(x.tolist(), half) if model.encoding.any
                            else model.answer(x, half))
    numbers = y
    if half is not None:  # ends clipped to the version's target bounds, if it has them
        bounds = np.empty((y.shape[0], 2 * y.shape[1]))
        bounds[:, 0::2] = lower
        bounds[:, 1::2] = upper
        numbers = np.hstack([y, bounds])
    rows = [[dialect.number(v) for v in row] + envelope_cells(dialect, e, half is not None)
            for row, e in zip(numbers.tolist(), env, strict=True)]
    return rows, sum(not e["inside"] for e in env)


def _reason(features: list[str], gap: np.ndarray) -> str:
    """The skipped cell of an incomplete row: which inputs are missing."""
    return quoted("missing " + ";".join(csv_cell(features[j]) for j in np.flatnonzero(gap)))
