"""How the cells of a time column (``--time COL``) are read as times.

Without ``--time-format`` a cell is an ISO 8601 stamp (UTC when it names no offset) or a
plain number, or, as files written with ``;`` and decimal commas usually carry them, a date
written ``01.05.2024``, ``01/05/2024`` or ``01-05-2024`` (four-digit year, optionally followed
by ``HH:MM`` or ``HH:MM:SS``). Whether such a date is day-first or month-first is decided
once for the whole column: a first field above 12 somewhere means day-first, a second field
above 12 month-first; a column where neither happens (or both do) is refused, naming the
column and asking for ``--time-format``. Nothing is guessed.

``--time-format FMT`` reads every cell with :meth:`datetime.datetime.strptime` and ``FMT``
(strftime codes, such as ``%d.%m.%Y %H:%M``); a stamp without ``%z`` is UTC.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from datetime import datetime, timezone

from trainer.errors import UserError

_EPOCH = datetime(1970, 1, 1, tzinfo=timezone.utc)
#: A date with its fields in either order: (first)(mark)(second)(mark)(year)[ time]
WRITTEN_DATE = re.compile(r"^(\d{1,2})([./-])(\d{1,2})\2(\d{4})"
                          r"(?:[ T](\d{1,2}):(\d{2})(?::(\d{2})(?:\.\d+)?)?)?$")
_EXAMPLE = "'%d.%m.%Y %H:%M'"


def _seconds(stamp: datetime) -> float:
    stamp = stamp if stamp.tzinfo else stamp.replace(tzinfo=timezone.utc)
    return (stamp - _EPOCH).total_seconds()


def iso_or_number(text: str) -> float:
    """An ISO 8601 stamp → seconds since 1970-01-01 UTC (UTC when no offset); a number →
    itself. ValueError otherwise."""
    text = text.strip()
    try:
        return float(text)
    except ValueError:
        pass
    return _seconds(datetime.fromisoformat(text.replace("Z", "+00:00").replace("z", "+00:00")))


@dataclass(frozen=True)
class TimeRule:
    """How one time column's text cells are read (picklable: it travels to Dask workers).

    ``formats`` empty: ISO 8601 or a number. Otherwise the ``strptime`` formats tried in
    order; ``given`` says whether the user named the format or it was detected.
    """

    formats: tuple[str, ...] = ()
    given: bool = False

    def seconds(self, text: str) -> float:
        """The cell as seconds since 1970-01-01 UTC (or the plain number); ValueError."""
        if not self.formats:
            return iso_or_number(text)
        text = text.strip()
        for fmt in self.formats:
            try:
                return _seconds(datetime.strptime(text, fmt))
            except ValueError:
                continue
        raise ValueError(text)

    def describe(self) -> str:
        """What the manifest records: the format given, or the order detected."""
        if not self.formats:
            return "ISO 8601 or a number"
        if self.given:
            return self.formats[0]
        order = "day first" if self.formats[0].startswith("%d") else "month first"
        return f"{self.formats[0]}, optionally with a time of day ({order}, detected)"

    def refusal(self, value) -> str:
        """Why ``value`` is not a time under this rule (after 'where, column X: ')."""
        if not self.formats:
            return (f"{value!r} is neither an ISO 8601 time nor a number (for dates written "
                    f"otherwise give --time-format, e.g. {_EXAMPLE})")
        if self.given:
            return f"{value!r} does not match --time-format {self.formats[0]!r}"
        return (f"{value!r} is not a date in the order found for this column "
                f"({self.formats[0][:8]}); give --time-format if the column mixes orders")


def given_format(fmt: str) -> TimeRule:
    """``--time-format FMT`` checked: it must hold a strftime code."""
    if "%" not in fmt:
        raise UserError(f"--time-format {fmt!r} holds no strftime code (such as %d, %m, %Y, "
                        f"%H, %M); e.g. {_EXAMPLE}")
    return TimeRule((fmt,), given=True)


def _formats(first: str, mark: str) -> tuple[str, ...]:
    day = f"%{first}{mark}%{'m' if first == 'd' else 'd'}{mark}%Y"
    return (day, *(f"{day}{sep}{clock}" for sep in (" ", "T")
                   for clock in ("%H:%M", "%H:%M:%S", "%H:%M:%S.%f")))


def decide(cells: Iterable[tuple[str, Callable[[], str]]], column: str,
           path: str = "") -> TimeRule:
    """The rule for a column from all its text cells: (text, where-it-is) pairs.

    ISO 8601 and numbers need no rule; written dates get day-first or month-first when the
    column shows which, else UserError naming the file, the column and ``--time-format``.
    """
    at = f"{path}: column {column!r}" if path else f"column {column!r}"
    marks: set[str] = set()
    day_first = month_first = None  # (text, where) of the first cell that decides
    dates = 0
    for text, where in cells:
        text = text.strip()
        try:
            iso_or_number(text)
            continue
        except ValueError:
            pass
        m = WRITTEN_DATE.match(text)
        if m is None:
            raise UserError(f"{where()}, column {column!r}: {TimeRule().refusal(text)}")
        dates += 1
        marks.add(m.group(2))
        if int(m.group(1)) > 12 and day_first is None:
            day_first = (text, where())
        if int(m.group(3)) > 12 and month_first is None:
            month_first = (text, where())
    if not dates:
        return TimeRule()
    if len(marks) > 1:
        raise UserError(f"{at}: dates are written with {' and '.join(sorted(marks))} "
                        f"between their fields; give --time-format, e.g. {_EXAMPLE}")
    mark = marks.pop()
    if day_first and month_first:
        raise UserError(f"{at}: {day_first[0]!r} ({day_first[1]}) is day-first but "
                        f"{month_first[0]!r} ({month_first[1]}) is month-first; give "
                        f"--time-format")
    if not (day_first or month_first):
        raise UserError(f"{at}: no date has a day above 12, so day-first and "
                        f"month-first read its {dates} dates alike; give --time-format "
                        f"'%d{mark}%m{mark}%Y' (day first) or '%m{mark}%d{mark}%Y', with "
                        "' %H:%M' when they carry a time")
    return TimeRule(_formats("d" if day_first else "m", mark))
