"""Cells as files hold them: blocks and chunks, missing values, numbers and times.

Shared by every input format of :mod:`trainer.read.source`. Empty cells (and the usual spellings of
missing: ``NA``, ``NaN``, ``null`` …) become NaN; the caller decides what a missing value
means. A time cell is read by a :class:`~trainer.read.dates.TimeRule` (default: an ISO 8601
timestamp, UTC when it names no offset, or a plain number).
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from trainer.errors import UserError
from trainer.read.dates import TimeRule, iso_or_number

#: The default time rule: ISO 8601 or a plain number.
ISO = TimeRule()
#: An ISO 8601 stamp or a number → seconds or the number (see :mod:`trainer.read.dates`).
parse_time_text = iso_or_number

#: Rows per block for Parquet and Excel.
BLOCK_ROWS = 100_000
#: Cell texts read as missing (pyarrow's defaults, minus the surprising ones such as "n/a").
MISSING = ["", "NA", "N/A", "NaN", "nan", "NAN", "null", "NULL", "None", "none", "#N/A"]
DECIMAL_COMMA = re.compile(r"^[+-]?\d+,\d+(?:[eE][+-]?\d+)?$")
DECIMAL_POINT = re.compile(r"^[+-]?\d*\.\d+(?:[eE][+-]?\d+)?$")
_EPOCH = datetime(1970, 1, 1, tzinfo=timezone.utc)


@dataclass(frozen=True)
class Block:
    """A part of a file that can be read on its own (CSV byte range, Parquet row group)."""

    index: int
    start: int  # CSV: byte offset; Parquet: row group number; Excel: first data row index
    end: int
    first_line: int  # file line (CSV) or sheet row (Excel) of the block's first record


@dataclass
class Chunk:
    """Numbers of one block: ``values[:, j]`` is column ``columns[j]``; NaN = missing."""

    block: Block
    values: np.ndarray  # (m, k) float64
    time: np.ndarray | None  # (m,) float64: seconds since 1970 (UTC) or plain numbers
    #: cells of the columns asked for as they are (CSV: the text written, missing spellings
    #: included; Parquet/Excel: the typed values, None when empty): ``cells[k][i]``
    cells: list[list] | None = None


def check_header(header: list, where: str) -> list[str]:
    """Column names as text; refuses an empty or a repeated name."""
    header = [str(h).strip() if h is not None else "" for h in header]
    seen: dict[str, int] = {}
    for j, name in enumerate(header):
        if not name:
            raise UserError(f"{where}, column {j + 1} has an empty name")
        if name in seen:
            raise UserError(
                f"{where}: column name {name!r} appears twice "
                f"(columns {seen[name] + 1} and {j + 1})"
            )
        seen[name] = j
    return header


def check_path(path) -> Path:
    """The path of an existing, non-empty file."""
    path = Path(path)
    if not path.is_file():
        raise UserError(f"{path}: no such file")
    if path.stat().st_size == 0:
        raise UserError(f"{path}: the file is empty")
    return path


def is_missing(value) -> bool:
    return value is None or (isinstance(value, str) and value.strip() in MISSING)


def time_value(value, rule: TimeRule = ISO) -> float:
    """A time cell of any type (datetime, number, text) → seconds or the number."""
    if isinstance(value, datetime):
        stamp = value if value.tzinfo else value.replace(tzinfo=timezone.utc)
        return (stamp - _EPOCH).total_seconds()
    if isinstance(value, bool):
        raise ValueError("a boolean is not a time")
    if isinstance(value, int | float):
        return float(value)
    return rule.seconds(str(value))


def one_time(value, where: str, column: str, rule: TimeRule = ISO) -> float:
    """One time cell, refused with ``where`` and the column when it is not a time."""
    if is_missing(value):
        return math.nan
    try:
        v = time_value(value, rule)
    except (ValueError, TypeError):
        raise UserError(f"{where}, column {column!r}: {rule.refusal(value)}") from None
    if not math.isfinite(v):
        raise UserError(f"{where}, column {column!r}: {value!r} is not a finite time")
    return v


def times_of(cells: list, where_row: Callable[[int], str], column: str,
             rule: TimeRule = ISO) -> np.ndarray:
    """A column of time cells (None = missing); ``where_row(i)`` names row i on refusal."""
    out = np.empty(len(cells))
    for i, cell in enumerate(cells):
        try:
            out[i] = math.nan if cell is None else time_value(cell, rule)
        except (ValueError, TypeError):
            raise UserError(f"{where_row(i)}, column {column!r}: {rule.refusal(cell)}") from None
    return out


def text_number(text: str, decimal: str) -> float:
    """A written number whose decimal mark is ``decimal`` ("." or ","); ValueError if none."""
    t = text.strip()
    return float(t.replace(",", ".") if decimal == "," else t)


def cell_number(value, where: str, decimal: str, hint: str = "") -> float:
    """A cell (text or a spreadsheet's number) as a finite float: the one rule of every
    reader. UserError naming ``where`` (file line or sheet row, and column) when it is not."""
    if isinstance(value, bool) or not isinstance(value, int | float | str):
        raise UserError(f"{where}: {value!r} is not a number")
    try:
        v = text_number(value, decimal) if isinstance(value, str) else float(value)
    except ValueError:
        raise UserError(f"{where}: {value!r} is not a number{hint}") from None
    if not math.isfinite(v):
        raise UserError(f"{where}: {value!r} is not a finite number")
    return v


def mostly_text(values: list, decimal: str) -> bool:
    """More than half of the non-missing cells are not numbers: a text or time column.

    A numeric column with a stray bad cell is not "text": reading it then names that cell.
    """
    numbers = texts = 0
    for v in values:
        if is_missing(v):
            continue
        if isinstance(v, bool) or not isinstance(v, int | float | str):
            texts += 1
            continue
        if isinstance(v, str):
            try:
                text_number(v, decimal)
            except ValueError:
                texts += 1
                continue
        numbers += 1
    return texts > numbers
