"""How a CSV file is written: encoding mark, separator, decimal mark and header.

Plant historians and lab systems export with ``,`` ``;`` tab or ``|`` between cells and a
decimal point or comma, depending on the locale. Both are detected from the first lines
unless given: the separator that splits the header into the most cells, consistently over
the next lines; the decimal comma when, with a separator other than ``,``, more sample cells
look like ``1,5`` than like ``1.5``.
"""

from __future__ import annotations

import csv
from dataclasses import dataclass
from pathlib import Path

from trainer.errors import UserError
from trainer.read.cells import DECIMAL_COMMA, DECIMAL_POINT, check_header

SEPARATORS = (",", ";", "\t", "|")


@dataclass(frozen=True)
class CsvLayout:
    """What reading a CSV file needs to know before its first data byte."""

    sep: str
    decimal: str
    header: list[str]
    data_offset: int  # bytes of the UTF-8 byte-order mark (0 or 3)
    header_bytes: int  # bytes of the header line, its line ending included


def detect(path: Path, sep: str | None = None, decimal: str | None = None) -> CsvLayout:
    """The layout of ``path``; ``sep`` and ``decimal`` are used as given when not None."""
    with open(path, "rb") as fh:
        head = fh.read(1 << 16)
    offset = 3 if head.startswith(b"\xef\xbb\xbf") else 0
    try:
        text = head[offset:].decode("utf-8", errors="strict")
    except UnicodeDecodeError as exc:
        # a cut multi-byte character at the end of the sample is fine
        if exc.start < len(head) - 4:
            raise UserError(f"{path}: not readable as UTF-8 text ({exc})") from None
        text = head[offset: offset + exc.start].decode()
    lines = text.splitlines()
    if not lines or not lines[0].strip():
        raise UserError(f"{path}: the first line (the header) is empty")
    if sep is not None and len(sep) != 1:
        raise UserError(f"--sep must be one character, got {sep!r}")
    if decimal is not None and decimal not in (".", ","):
        raise UserError(f"--decimal must be '.' or ',', got {decimal!r}")
    sep = sep or sniff_sep(lines)
    sample = [row for row in csv.reader(lines[1:50], delimiter=sep) if row]
    decimal = decimal or sniff_decimal(sep, sample)
    if sep == decimal:
        raise UserError(f"{path}: separator and decimal mark are both {sep!r}; "
                        "give --sep and --decimal")
    header = check_header(next(csv.reader([lines[0]], delimiter=sep)), f"{path}: line 1")
    if len(header) == 1:
        for other in SEPARATORS:
            if other != sep and other in lines[0]:
                raise UserError(
                    f"{path}: line 1 has one column with the separator {sep!r}, "
                    f"but the lines contain {other!r}; give --sep {other!r}")
    # the header's own line ending may be \r\n
    raw_first = head[offset:].split(b"\n", 1)[0]
    return CsvLayout(sep, decimal, header, offset, len(raw_first) + 1)


def sniff_sep(lines: list[str]) -> str:
    """The candidate that splits the header into the most cells, consistently."""
    best, best_cells = ",", 1
    for cand in SEPARATORS:
        rows = list(csv.reader(lines[:20], delimiter=cand))
        rows = [r for r in rows if r]
        if not rows:
            continue
        cells = len(rows[0])
        consistent = sum(len(r) == cells for r in rows[1:]) >= 0.8 * (len(rows) - 1)
        if cells > best_cells and consistent:
            best, best_cells = cand, cells
    return best


def sniff_decimal(sep: str, sample: list[list[str]]) -> str:
    """',' when more sample cells are written with a decimal comma than a point."""
    if sep == ",":
        return "."
    comma = sum(bool(DECIMAL_COMMA.match(c.strip())) for r in sample for c in r)
    point = sum(bool(DECIMAL_POINT.match(c.strip())) for r in sample for c in r)
    return "," if comma > point else "."
