"""Reading Parquet (pyarrow, by row group) and Excel (openpyxl, read-only, first sheet).

Both hold typed cells, so there is no dialect to detect: a Parquet column must have a
numeric type; an Excel cell may be a number or a number written as text (decimal comma
accepted). Refusals name the row (Parquet: data row; Excel: sheet and sheet row) and column.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from pathlib import Path

import numpy as np

from trainer.errors import UserError
from trainer.read.cells import (
    BLOCK_ROWS,
    ISO,
    Block,
    Chunk,
    cell_number,
    check_header,
    is_missing,
    mostly_text,
    one_time,
    times_of,
)


class ParquetTable:
    """A Parquet file; its blocks are its row groups."""

    def __init__(self, path: Path):
        import pyarrow.parquet as pq

        self.path = path
        try:
            self.pq = pq.ParquetFile(path)
        except Exception as exc:  # pyarrow raises several types for a damaged file
            raise UserError(f"{path}: not readable as Parquet ({exc})") from None
        self.header = check_header(list(self.pq.schema_arrow.names), f"{path}: header")
        self.time_rule = ISO

    def blocks(self) -> list[Block]:
        return [Block(i, i, i + 1, 0) for i in range(self.pq.num_row_groups)]

    def chunk(self, block: Block, columns: list[str], time: str | None,
              first_row: int, cells: list[str] | None = None) -> Chunk:
        """Numbers of ``columns`` (and ``time``) in one row group, and the typed values of
        the ``cells`` columns; ``first_row`` is the group's first data row index (messages)."""
        import pyarrow as pa

        wanted = list(dict.fromkeys(columns + ([time] if time else []) + (cells or [])))
        table = self.pq.read_row_group(block.start, columns=wanted)
        cols = []
        for name in columns:
            col = table.column(name)
            if not (pa.types.is_integer(col.type) or pa.types.is_floating(col.type)
                    or pa.types.is_decimal(col.type)):
                raise UserError(f"{self.path}: column {name!r} is not numeric ({col.type})")
            cols.append(col.cast(pa.float64()).to_numpy(zero_copy_only=False))
        values = (np.column_stack(cols) if cols else np.empty((table.num_rows, 0)))
        values = np.ascontiguousarray(values, dtype=np.float64)
        bad = np.isinf(values)
        if bad.any():
            i, j = np.argwhere(bad)[0]
            raise UserError(f"{self.path}: row {first_row + i + 1}, column {columns[j]!r}: "
                            "not a finite number")
        times = None
        if time:
            col = table.column(time)
            if pa.types.is_timestamp(col.type):
                ns = col.cast(pa.timestamp("ns", tz=col.type.tz)).cast(pa.int64())
                times = ns.to_numpy(zero_copy_only=False).astype(np.float64) / 1e9
                if col.null_count:
                    times[np.asarray(col.is_null())] = np.nan
            else:
                times = times_of(col.to_pylist(),
                                 lambda i: f"{self.path}: row {first_row + i + 1}", time,
                                 self.time_rule)
        kept = [table.column(c).to_pylist() for c in cells] if cells else None
        return Chunk(block, values, times, kept)

    def numeric_probe(self, columns: list[str]) -> list[str]:
        """Names among ``columns`` whose type is not a number."""
        import pyarrow as pa

        schema = self.pq.schema_arrow
        return [c for c in columns if not (pa.types.is_integer(schema.field(c).type)
                                           or pa.types.is_floating(schema.field(c).type))]


class ExcelSheet:
    """The first sheet of an Excel workbook, read whole in blocks of :data:`BLOCK_ROWS`."""

    def __init__(self, path: Path):
        try:
            import openpyxl
        except ImportError:
            raise UserError(f"{path}: reading .xlsx needs openpyxl "
                            "(pip install 'kridge[train]')") from None
        self.path = path
        try:
            book = openpyxl.load_workbook(path, read_only=True, data_only=True)
        except Exception as exc:  # zipfile, XML and openpyxl errors alike
            raise UserError(f"{path}: not readable as an Excel workbook ({exc})") from None
        sheet = book.worksheets[0]
        self.sheet = sheet.title
        rows = sheet.iter_rows(values_only=True)
        first = next(rows, None)
        book.close()
        if first is None:
            raise UserError(f"{path}: sheet {self.sheet!r} is empty")
        while first and first[-1] is None:  # trailing empty header cells
            first = first[:-1]
        self.header = check_header(list(first), f"{path}: sheet {self.sheet!r}, row 1")
        self.time_rule = ISO

    def where(self, block: Block, row: int) -> str:
        return f"{self.path}: sheet {self.sheet!r}, row {block.first_line + row}"

    def rows(self) -> Iterator[tuple[int, tuple]]:
        """(sheet row, cells) of every non-empty data row."""
        import openpyxl

        book = openpyxl.load_workbook(self.path, read_only=True, data_only=True)
        try:
            for r, row in enumerate(book.worksheets[0].iter_rows(values_only=True)):
                if r and any(v is not None and v != "" for v in row):
                    yield r + 1, row
        finally:
            book.close()

    def chunks(self, columns: list[str], time: str | None,
               cells: list[str] | None = None) -> Iterator[Chunk]:
        index = [self.header.index(c) for c in columns]
        kept = [self.header.index(c) for c in cells or []]
        t_index = self.header.index(time) if time else None
        batch: list[tuple[int, tuple]] = []
        count = 0

        def flush() -> Chunk:
            block = Block(count, 0, 0, batch[0][0] if batch else 2)
            values = np.empty((len(batch), len(columns)))
            times = np.empty(len(batch)) if time else None
            for i, (sheet_row, row) in enumerate(batch):
                for k, j in enumerate(index):
                    values[i, k] = self._number(row[j] if j < len(row) else None,
                                                sheet_row, columns[k])
                if time:
                    cell = row[t_index] if t_index < len(row) else None
                    times[i] = one_time(cell, f"{self.path}: sheet {self.sheet!r}, "
                                              f"row {sheet_row}", time, self.time_rule)
            texts = ([[row[j] if j < len(row) else None for _, row in batch] for j in kept]
                     if cells else None)
            return Chunk(block, values, times, texts)

        for item in self.rows():
            batch.append(item)
            if len(batch) == BLOCK_ROWS:
                yield flush()
                count += 1
                batch = []
        if batch or not count:
            yield flush()

    def _number(self, value, sheet_row: int, column: str) -> float:
        if is_missing(value):
            return math.nan
        return cell_number(value, f"{self.path}: sheet {self.sheet!r}, row {sheet_row}, "
                                  f"column {column!r}", ",")

    def numeric_probe(self, columns: list[str]) -> list[str]:
        """Names among ``columns`` whose first 200 rows are mostly not numbers."""
        rows = []
        for _, row in self.rows():
            rows.append(row)
            if len(rows) == 200:
                break
        cells = {c: [r[self.header.index(c)] if self.header.index(c) < len(r) else None
                     for r in rows] for c in columns}
        return [c for c, vals in cells.items() if mostly_text(vals, ",")]
