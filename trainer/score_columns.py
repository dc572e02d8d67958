"""The cells ``kridge predict`` writes: numbers, text, kept cells, and the envelope columns.

A scoring file is written in the dialect it was read in (separator and decimal mark), so a
file exported with ``;`` and decimal commas comes back the same way. Numbers are written
unquoted (``repr`` of the float, so they read back exactly, with the decimal mark swapped
when it is a comma); every text cell is quoted (``"`` doubled inside) and goes through
:func:`service.text_safety.csv_cell`, so a name such as ``=cmd|' /C calc'!A0`` reaches a
spreadsheet as text. A kept cell (``--keep``) is copied as the file holds it: a cell written
as a plain number stays that number, unquoted; anything else is a text cell; an empty cell
stays empty.

The envelope columns are produced here only (:data:`ENVELOPE_COLUMNS`, :func:`envelope_cells`):
a new envelope statistic is one more name and one more cell in these two places.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from datetime import date, datetime, time
from decimal import Decimal

from service.text_safety import csv_cell

#: The envelope's columns, in order, after the predictions (and interval bounds): ``t2`` and
#: ``q`` empty for versions without the shape check, ``target_out_of_range`` and
#: ``flagged_by`` names joined by ``;``.
ENVELOPE_COLUMNS = ("inside", "novelty", "out_of_range", "t2", "q", "target_out_of_range",
                    "flagged_by")
#: With a coverage, after the envelope: whether the row's interval is calibrated (inside).
CALIBRATED = "interval_calibrated"

_NUMBER = {".": re.compile(r"^[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?$"),
           ",": re.compile(r"^[+-]?(?:\d+(?:,\d*)?|,\d+)(?:[eE][+-]?\d+)?$")}


@dataclass(frozen=True)
class Dialect:
    """How the output is written: cell separator and decimal mark."""

    sep: str = ","
    decimal: str = "."

    def number(self, value: float) -> str:
        """A finite float as an unquoted cell; NaN (a value not computed) as an empty one."""
        if math.isnan(value):
            return ""
        text = repr(float(value))
        return text.replace(".", ",") if self.decimal == "," else text

    @staticmethod
    def text(value: str) -> str:
        """A quoted text cell, neutralised for spreadsheets."""
        return quoted(csv_cell(value))

    def kept(self, value) -> str:
        """A kept cell as the file holds it (CSV: text as written; Parquet/Excel: typed)."""
        if value is None:
            return ""
        if isinstance(value, str):
            if not value or _NUMBER[self.decimal].match(value):
                return value
            return self.text(value)
        if isinstance(value, bool):
            return self.text("true" if value else "false")
        if isinstance(value, int):
            return str(value)
        if isinstance(value, float | Decimal):
            return self.number(float(value)) if not math.isinf(value) else self.text(str(value))
        if isinstance(value, datetime | date | time):
            return self.text(value.isoformat())
        return self.text(str(value))

    def line(self, cells: list[str]) -> str:
        return self.sep.join(cells) + "\n"


def quoted(text: str) -> str:
    """``text`` as one quoted cell (``"`` doubled inside); already neutralised."""
    return '"' + text.replace('"', '""') + '"'


def envelope_cells(dialect: Dialect, env: dict, intervals: bool = False) -> list[str]:
    """The :data:`ENVELOPE_COLUMNS` cells of one row's envelope report (and, with
    ``intervals``, the :data:`CALIBRATED` cell); a text feature whose category training never
    saw is named in ``out_of_range`` as ``feature=value``; a check the version lacks is an
    empty cell."""
    named = [*env["out_of_range"], *(f"{f}={v}" for f, v in env.get("new_category", {}).items())]
    inside = dialect.text("true" if env["inside"] else "false")
    cells = [inside, dialect.number(env["novelty"]),
             quoted(";".join(csv_cell(f) for f in named)),
             dialect.number(env["t2"]) if "t2" in env else "",
             dialect.number(env["q"]) if "q" in env else "",
             quoted(";".join(csv_cell(t) for t in env.get("target_out_of_range") or ())),
             quoted(";".join(env["flagged_by"]))]
    return cells + [inside] if intervals else cells


def skipped_envelope_cells() -> list[str]:
    """The envelope cells of a row that was not scored: all empty."""
    return [""] * len(ENVELOPE_COLUMNS)
