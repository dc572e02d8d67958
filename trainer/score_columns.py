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

#: The envelope's columns, in order, after the predictions (and interval bounds).
ENVELOPE_COLUMNS = ("inside", "novelty", "out_of_range")

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


def envelope_cells(dialect: Dialect, env: dict) -> list[str]:
    """The :data:`ENVELOPE_COLUMNS` cells of one row's envelope report; a text feature
    whose category training never saw is named in ``out_of_range`` as ``feature=value``."""
    named = [*env["out_of_range"], *(f"{f}={v}" for f, v in env.get("new_category", {}).items())]
    return [dialect.text("true" if env["inside"] else "false"), dialect.number(env["novelty"]),
            quoted(";".join(csv_cell(f) for f in named))]


def skipped_envelope_cells() -> list[str]:
    """The envelope cells of a row that was not scored: all empty."""
    return [""] * len(ENVELOPE_COLUMNS)
