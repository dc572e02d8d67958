"""Reading a CSV file in blocks: byte ranges cut at record boundaries, parsed by pyarrow.

A block is a byte range of whole records, which is also what lets a Dask cluster read its
own part of a file. pyarrow parses a block multi-threaded and typed, converting only the
columns asked for, so other columns (a tag name, a comment, an unused timestamp) may hold
anything. pyarrow only reports *that* a block failed; the failing block is then re-read by a
slow exact scan that names the file line and the column of the first bad cell.
"""

from __future__ import annotations

import csv
import io
from collections.abc import Iterator
from pathlib import Path

import numpy as np

from trainer.errors import UserError
from trainer.read.cells import (
    DECIMAL_COMMA,
    ISO,
    MISSING,
    Block,
    Chunk,
    cell_number,
    mostly_text,
    times_of,
)
from trainer.read.csv_dialect import CsvLayout

#: Bytes per CSV block: about 100,000 rows of ten numbers; bounds memory per block.
BLOCK_BYTES = 8 << 20


class CsvFile:
    """A CSV file of a known layout (:func:`trainer.read.csv_dialect.detect`)."""

    def __init__(self, path: Path, layout: CsvLayout):
        self.path = path
        self.layout = layout
        self.sep, self.decimal, self.header = layout.sep, layout.decimal, layout.header
        self.time_rule = ISO  # how the time column's cells read (Source.settle_time)

    def blocks(self, block_bytes: int = BLOCK_BYTES) -> Iterator[Block]:
        """Byte ranges of whole records: cut at a newline outside quotes."""
        size = self.path.stat().st_size
        start = self.layout.data_offset + self.layout.header_bytes
        line = 2
        index = 0
        with open(self.path, "rb") as fh:
            while start < size:
                fh.seek(start)
                buf = fh.read(block_bytes)
                if start + len(buf) < size:
                    cut = buf.rfind(b"\n")
                    # a newline inside a quoted cell is not a record boundary: quotes before
                    # a real boundary come in pairs ("" escapes count twice)
                    while cut >= 0 and buf.count(b'"', 0, cut) % 2:
                        cut = buf.rfind(b"\n", 0, cut)
                    if cut < 0:  # one record longer than a block: take a bigger bite
                        block_bytes *= 2
                        continue
                    buf = buf[: cut + 1]
                yield Block(index, start, start + len(buf), line)
                line += buf.count(b"\n")
                start += len(buf)
                index += 1

    def read_bytes(self, block: Block) -> bytes:
        with open(self.path, "rb") as fh:
            fh.seek(block.start)
            return fh.read(block.end - block.start)

    def line_of(self, block: Block, row: int) -> int:
        """File line on which data row ``row`` of ``block`` starts (blank lines skipped)."""
        text = self.read_bytes(block).decode("utf-8", errors="replace")
        reader = csv.reader(io.StringIO(text), delimiter=self.sep)
        seen, start = -1, 1
        for rec in reader:
            if rec:
                seen += 1
                if seen == row:
                    return block.first_line + start - 1
            start = reader.line_num + 1
        return block.first_line + start - 1

    def where(self, block: Block, row: int) -> str:
        return f"{self.path}: line {self.line_of(block, row)}"

    def chunk(self, block: Block, columns: list[str], time: str | None,
              cells: list[str] | None = None) -> Chunk:
        """Numbers of ``columns`` (and the ``time`` column) in one block, and the text of the
        ``cells`` columns as written."""
        import pyarrow as pa

        raw = self.read_bytes(block)
        wanted = columns + ([time] if time else [])
        if not wanted:  # only cells as written (pyarrow would read every column)
            texts = self._texts(raw, cells or [])
            return Chunk(block, np.empty((len(texts[0]) if texts else 0, 0)), None, texts)
        types = {c: pa.float64() for c in columns}
        if time:
            types[time] = pa.string()
        try:
            # Parsed on this thread: after a refused block, pyarrow's parallel parse can leave
            # tasks on its thread pool that abort the process at exit ("terminate called
            # without an active exception", apache/arrow#34314), turning a one-line refusal
            # into SIGABRT. Blocks are small, so the cost is a fraction of a second per 10⁶ rows.
            table = self.arrow_table(raw, wanted, types, missing=True, decimal=self.decimal)
        except (pa.ArrowInvalid, UnicodeDecodeError) as exc:
            self._explain(block, raw, columns, exc)
            raise AssertionError("unreachable") from exc  # _explain always raises
        values = np.column_stack(
            [table.column(c).to_numpy(zero_copy_only=False) for c in columns]
        ) if columns else np.empty((table.num_rows, 0))
        values = np.ascontiguousarray(values, dtype=np.float64)
        if np.isinf(values).any():  # the exact scan names the cell as written
            self._explain(block, raw, columns, None)
        times = None
        if time:
            times = times_of(table.column(time).to_pylist(),
                             lambda i: self.where(block, i), time, self.time_rule)
        return Chunk(block, values, times, self._texts(raw, cells) if cells else None)

    def arrow_table(self, raw: bytes, include: list[str], types: dict, missing: bool,
                    decimal: str = "."):
        """pyarrow's table of one block's ``include`` columns, typed as ``types``, parsed on
        this thread (see :meth:`chunk` for why); ``missing``: the missing-value words (and
        empty cells) read as null, else every cell as written."""
        import pyarrow.csv as pcsv

        return pcsv.read_csv(
            io.BytesIO(raw),
            read_options=pcsv.ReadOptions(column_names=self.header, use_threads=False),
            parse_options=pcsv.ParseOptions(delimiter=self.sep,
                                            newlines_in_values=b'"' in raw),
            convert_options=pcsv.ConvertOptions(
                include_columns=include, column_types=types,
                null_values=MISSING if missing else [], strings_can_be_null=missing,
                quoted_strings_can_be_null=missing, decimal_point=decimal),
        )

    def _texts(self, raw: bytes, columns: list[str]) -> list[list[str]]:
        """The cells of ``columns`` as written (quotes removed, nothing read as missing)."""
        import pyarrow as pa

        table = self.arrow_table(raw, columns, dict.fromkeys(columns, pa.string()),
                                 missing=False)
        return [table.column(c).to_pylist() for c in columns]

    def _explain(self, block: Block, raw: bytes, columns: list[str], exc) -> None:
        """Find the first bad record or cell of a block that pyarrow refused, and say so."""
        try:
            text = raw.decode("utf-8")
        except UnicodeDecodeError as err:
            line = block.first_line + raw[: err.start].count(b"\n")
            raise UserError(f"{self.path}: line {line}: not UTF-8 text") from None
        reader = csv.reader(io.StringIO(text), delimiter=self.sep)
        width = len(self.header)
        index = {c: self.header.index(c) for c in columns}
        start = 1
        try:
            for rec in reader:
                line = block.first_line + start - 1
                start = reader.line_num + 1
                if not rec:
                    continue
                if len(rec) != width:
                    hint = ""
                    if width == 1 or len(rec) == 1:
                        hint = ("; the separator is " + repr(self.sep) +
                                ": give --sep if the file uses another one")
                    raise UserError(f"{self.path}: line {line} has {len(rec)} cells, "
                                    f"the header has {width}{hint}")
                for name, j in index.items():
                    self._check_cell(rec[j], line, name)
        except csv.Error as err:
            raise UserError(f"{self.path}: line {block.first_line + reader.line_num - 1}: "
                            f"{err}") from None
        raise UserError(f"{self.path}: lines {block.first_line}–"
                        f"{block.first_line + text.count(chr(10))}: not readable ({exc})")

    def _check_cell(self, written: str, line: int, name: str) -> None:
        cell = written.strip()
        if cell in MISSING:
            return
        hint = (" (decimal comma? give --decimal ',')"
                if self.decimal == "." and DECIMAL_COMMA.match(cell) else "")
        cell_number(written, f"{self.path}: line {line}, column {name!r}", self.decimal, hint)

    def numeric_probe(self, columns: list[str]) -> list[str]:
        """Names among ``columns`` whose first rows are mostly not numbers."""
        block = next(self.blocks(1 << 16), None)
        if block is None:
            return []
        text = self.read_bytes(block).decode("utf-8", errors="replace")
        rows = [r for r in csv.reader(io.StringIO(text), delimiter=self.sep) if r][:200]
        cells = {c: [r[self.header.index(c)] if self.header.index(c) < len(r) else ""
                     for r in rows] for c in columns}
        return [c for c, vals in cells.items() if mostly_text(vals, self.decimal)]
