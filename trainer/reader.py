"""One streaming reader for every input: CSV (any common dialect), Parquet and Excel.

Numbers are parsed by pyarrow (CSV: multi-threaded, typed; Parquet: row groups) and Excel by
openpyxl in read-only mode. A file is read in blocks, so a file larger than memory can be
trained on or scored; only the columns asked for are converted, so other columns (a tag
name, a comment, a timestamp that is not used) may hold anything.

CSV blocks are byte ranges cut at record boundaries, which is also what lets a Dask cluster
read its own part of a file (:meth:`Source.blocks`). Empty cells (and the usual spellings of
missing: ``NA``, ``NaN``, ``null`` …) become NaN; the caller decides what a missing value
means. A cell that is not a number stops the read with the file line (or sheet row) and the
column: the fast path only reports that a block failed, so the failing block is re-read by a
slow exact scan that finds the first bad cell.
"""

from __future__ import annotations

import csv
import io
import math
import re
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from service.store import sha256_file
from trainer.errors import UserError

#: Bytes per CSV block: about 100,000 rows of ten numbers; bounds memory per block.
BLOCK_BYTES = 8 << 20
#: Rows per block for Parquet and Excel.
BLOCK_ROWS = 100_000
#: Cell texts read as missing (pyarrow's defaults, minus the surprising ones such as "n/a").
MISSING = ["", "NA", "N/A", "NaN", "nan", "NAN", "null", "NULL", "None", "none", "#N/A"]
SEPARATORS = (",", ";", "\t", "|")
_DECIMAL_COMMA = re.compile(r"^[+-]?\d+,\d+(?:[eE][+-]?\d+)?$")
_DECIMAL_POINT = re.compile(r"^[+-]?\d*\.\d+(?:[eE][+-]?\d+)?$")
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


def _check_header(header: list[str], where: str) -> list[str]:
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


def _check_path(path) -> Path:
    path = Path(path)
    if not path.is_file():
        raise UserError(f"{path}: no such file")
    if path.stat().st_size == 0:
        raise UserError(f"{path}: the file is empty")
    return path


def parse_time_text(text: str) -> float:
    """A timestamp cell → seconds since 1970-01-01 UTC (ISO 8601) or the number itself.

    ISO 8601 without a zone offset is taken as UTC.
    """
    text = text.strip()
    try:
        return float(text)
    except ValueError:
        pass
    stamp = datetime.fromisoformat(text.replace("Z", "+00:00").replace("z", "+00:00"))
    if stamp.tzinfo is None:
        stamp = stamp.replace(tzinfo=timezone.utc)
    return (stamp - _EPOCH).total_seconds()


def _time_value(value) -> float:
    if isinstance(value, datetime):
        stamp = value if value.tzinfo else value.replace(tzinfo=timezone.utc)
        return (stamp - _EPOCH).total_seconds()
    if isinstance(value, bool):
        raise ValueError("a boolean is not a time")
    if isinstance(value, int | float):
        return float(value)
    return parse_time_text(str(value))


def _mostly_text(values: list, decimal: str) -> bool:
    """More than half of the non-missing cells are not numbers: a text or time column.

    A numeric column with a stray bad cell is not "text": reading it then names that cell.
    """
    numbers = texts = 0
    for v in values:
        if v is None or (isinstance(v, str) and v.strip() in MISSING):
            continue
        if isinstance(v, bool) or not isinstance(v, int | float | str):
            texts += 1
            continue
        if isinstance(v, str):
            try:
                float(v.strip().replace(",", ".") if decimal == "," else v.strip())
            except ValueError:
                texts += 1
                continue
        numbers += 1
    return texts > numbers


class Source:
    """An input file, opened and its header checked; read it with :meth:`chunks`.

    Parameters
    ----------
    path : CSV (``.csv``, ``.txt``, ``.tsv`` or anything else), ``.parquet``/``.pq`` or
        ``.xlsx``/``.xlsm``.
    sep, decimal : CSV separator and decimal mark; detected from the first lines when None.
    """

    def __init__(self, path, sep: str | None = None, decimal: str | None = None):
        self.path = _check_path(path)
        suffix = self.path.suffix.lower()
        self.kind = {".parquet": "parquet", ".pq": "parquet", ".xlsx": "excel",
                     ".xlsm": "excel"}.get(suffix, "csv")
        self._sha256: str | None = None
        self.sep, self.decimal = ",", "."
        if self.kind == "csv":
            self._open_csv(sep, decimal)
        elif self.kind == "parquet":
            self._open_parquet()
        else:
            self._open_excel()

    # -- identity ------------------------------------------------------------------------
    @property
    def sha256(self) -> str:
        """The data fingerprint: sha256 of the file's bytes."""
        if self._sha256 is None:
            self._sha256 = sha256_file(self.path)
        return self._sha256

    def where(self, block: Block, row: int, first_row: int = 0) -> str:
        """'file: line N' (CSV), 'file: sheet S, row N' (Excel) or 'file: row N' (Parquet) of
        data row ``row`` of ``block``; ``first_row`` is the block's first data row index."""
        if self.kind == "csv":
            return f"{self.path}: line {self._csv_line(block, row)}"
        if self.kind == "excel":
            return f"{self.path}: sheet {self.sheet!r}, row {block.first_line + row}"
        return f"{self.path}: row {first_row + row + 1}"

    def dialect(self) -> dict:
        """What was used to read the file (for the manifest)."""
        out = {"format": self.kind}
        if self.kind == "csv":
            out.update(separator=self.sep, decimal=self.decimal)
        if self.kind == "excel":
            out["sheet"] = self.sheet
        return out

    # -- CSV -----------------------------------------------------------------------------
    def _open_csv(self, sep: str | None, decimal: str | None) -> None:
        with open(self.path, "rb") as fh:
            head = fh.read(1 << 16)
        bom = head.startswith(b"\xef\xbb\xbf")
        self._data_offset = 3 if bom else 0
        try:
            text = head[self._data_offset:].decode("utf-8", errors="strict")
        except UnicodeDecodeError as exc:
            # a cut multi-byte character at the end of the sample is fine
            if exc.start < len(head) - 4:
                raise UserError(f"{self.path}: not readable as UTF-8 text ({exc})") from None
            text = head[self._data_offset: self._data_offset + exc.start].decode()
        lines = text.splitlines()
        if not lines or not lines[0].strip():
            raise UserError(f"{self.path}: the first line (the header) is empty")
        if sep is not None and len(sep) != 1:
            raise UserError(f"--sep must be one character, got {sep!r}")
        if decimal is not None and decimal not in (".", ","):
            raise UserError(f"--decimal must be '.' or ',', got {decimal!r}")
        self.sep = sep or self._sniff_sep(lines)
        sample = [row for row in csv.reader(lines[1:50], delimiter=self.sep) if row]
        self.decimal = decimal or self._sniff_decimal(sample)
        if self.sep == self.decimal:
            raise UserError(f"{self.path}: separator and decimal mark are both {self.sep!r}; "
                            "give --sep and --decimal")
        header = next(csv.reader([lines[0]], delimiter=self.sep))
        self.header = _check_header(header, f"{self.path}: line 1")
        # the header's own line ending may be \r\n
        raw_first = head[self._data_offset:].split(b"\n", 1)[0]
        self._header_bytes = len(raw_first) + 1
        if len(self.header) == 1:
            for other in SEPARATORS:
                if other != self.sep and other in lines[0]:
                    raise UserError(
                        f"{self.path}: line 1 has one column with the separator {self.sep!r}, "
                        f"but the lines contain {other!r}; give --sep {other!r}")

    @staticmethod
    def _sniff_sep(lines: list[str]) -> str:
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

    def _sniff_decimal(self, sample: list[list[str]]) -> str:
        if self.sep == ",":
            return "."
        comma = sum(bool(_DECIMAL_COMMA.match(c.strip())) for r in sample for c in r)
        point = sum(bool(_DECIMAL_POINT.match(c.strip())) for r in sample for c in r)
        return "," if comma > point else "."

    def _csv_blocks(self, block_bytes: int) -> Iterator[Block]:
        """Byte ranges of whole records: cut at a newline outside quotes."""
        size = self.path.stat().st_size
        start = self._data_offset + self._header_bytes
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

    def _read_csv_bytes(self, block: Block) -> bytes:
        with open(self.path, "rb") as fh:
            fh.seek(block.start)
            return fh.read(block.end - block.start)

    def _csv_line(self, block: Block, row: int) -> int:
        """File line on which data row ``row`` of ``block`` starts (blank lines skipped)."""
        text = self._read_csv_bytes(block).decode("utf-8", errors="replace")
        reader = csv.reader(io.StringIO(text), delimiter=self.sep)
        seen, start = -1, 1
        for rec in reader:
            if rec:
                seen += 1
                if seen == row:
                    return block.first_line + start - 1
            start = reader.line_num + 1
        return block.first_line + start - 1

    def _csv_chunk(self, block: Block, columns: list[str], time: str | None) -> Chunk:
        import pyarrow as pa
        import pyarrow.csv as pcsv

        raw = self._read_csv_bytes(block)
        wanted = columns + ([time] if time else [])
        types = {c: pa.float64() for c in columns}
        if time:
            types[time] = pa.string()
        try:
            table = pcsv.read_csv(
                io.BytesIO(raw),
                read_options=pcsv.ReadOptions(column_names=self.header, use_threads=True),
                parse_options=pcsv.ParseOptions(delimiter=self.sep,
                                                newlines_in_values=b'"' in raw),
                convert_options=pcsv.ConvertOptions(
                    include_columns=wanted, column_types=types, null_values=MISSING,
                    strings_can_be_null=True, quoted_strings_can_be_null=True,
                    decimal_point=self.decimal),
            )
        except (pa.ArrowInvalid, UnicodeDecodeError) as exc:
            self._explain_csv(block, raw, columns, time, exc)
            raise AssertionError("unreachable") from exc  # _explain_csv always raises
        values = np.column_stack(
            [table.column(c).to_numpy(zero_copy_only=False) for c in columns]
        ) if columns else np.empty((table.num_rows, 0))
        values = np.ascontiguousarray(values, dtype=np.float64)
        if np.isinf(values).any():  # the exact scan names the cell as written
            self._explain_csv(block, raw, columns, time, None)
        times = None
        if time:
            times = self._times(table.column(time).to_pylist(), block, time)
        return Chunk(block, values, times)

    def _explain_csv(self, block: Block, raw: bytes, columns, time, exc) -> None:
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
                    cell = rec[j].strip()
                    if cell in MISSING:
                        continue
                    number = cell.replace(",", ".") if self.decimal == "," else cell
                    try:
                        v = float(number)
                    except ValueError:
                        hint = ""
                        if self.decimal == "." and _DECIMAL_COMMA.match(cell):
                            hint = " (decimal comma? give --decimal ',')"
                        raise UserError(f"{self.path}: line {line}, column {name!r}: "
                                        f"{rec[j]!r} is not a number{hint}") from None
                    if not math.isfinite(v):
                        raise UserError(f"{self.path}: line {line}, column {name!r}: "
                                        f"{rec[j]!r} is not a finite number")
        except csv.Error as err:
            raise UserError(f"{self.path}: line {block.first_line + reader.line_num - 1}: "
                            f"{err}") from None
        raise UserError(f"{self.path}: lines {block.first_line}–"
                        f"{block.first_line + text.count(chr(10))}: not readable ({exc})")

    # -- Parquet -------------------------------------------------------------------------
    def _open_parquet(self) -> None:
        import pyarrow.parquet as pq

        try:
            self._pq = pq.ParquetFile(self.path)
        except Exception as exc:  # pyarrow raises several types for a damaged file
            raise UserError(f"{self.path}: not readable as Parquet ({exc})") from None
        self.header = _check_header(list(self._pq.schema_arrow.names), f"{self.path}: header")

    def _parquet_chunk(self, block: Block, columns: list[str], time: str | None,
                       first_row: int) -> Chunk:
        import pyarrow as pa

        table = self._pq.read_row_group(block.start, columns=columns + ([time] if time else []))
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
                times = self._times(col.to_pylist(), block, time, first_row)
        return Chunk(block, values, times)

    # -- Excel ---------------------------------------------------------------------------
    def _open_excel(self) -> None:
        try:
            import openpyxl
        except ImportError:
            raise UserError(f"{self.path}: reading .xlsx needs openpyxl "
                            "(pip install 'kridge[train]')") from None
        try:
            book = openpyxl.load_workbook(self.path, read_only=True, data_only=True)
        except Exception as exc:  # zipfile, XML and openpyxl errors alike
            raise UserError(f"{self.path}: not readable as an Excel workbook ({exc})") from None
        sheet = book.worksheets[0]
        self.sheet = sheet.title
        rows = sheet.iter_rows(values_only=True)
        first = next(rows, None)
        book.close()
        if first is None:
            raise UserError(f"{self.path}: sheet {self.sheet!r} is empty")
        while first and first[-1] is None:  # trailing empty header cells
            first = first[:-1]
        self.header = _check_header(list(first), f"{self.path}: sheet {self.sheet!r}, row 1")

    def _excel_rows(self) -> Iterator[tuple[int, tuple]]:
        import openpyxl

        book = openpyxl.load_workbook(self.path, read_only=True, data_only=True)
        try:
            for r, row in enumerate(book.worksheets[0].iter_rows(values_only=True)):
                if r and any(v is not None and v != "" for v in row):
                    yield r + 1, row
        finally:
            book.close()

    def _excel_chunks(self, columns: list[str], time: str | None) -> Iterator[Chunk]:
        index = [self.header.index(c) for c in columns]
        t_index = self.header.index(time) if time else None
        batch: list[tuple[int, tuple]] = []
        count = 0

        def flush() -> Chunk:
            block = Block(count, 0, 0, batch[0][0] if batch else 2)
            values = np.empty((len(batch), len(columns)))
            times = np.empty(len(batch)) if time else None
            for i, (sheet_row, row) in enumerate(batch):
                for k, j in enumerate(index):
                    values[i, k] = self._excel_number(row[j] if j < len(row) else None,
                                                      sheet_row, columns[k])
                if time:
                    cell = row[t_index] if t_index < len(row) else None
                    times[i] = self._one_time(cell, f"{self.path}: sheet {self.sheet!r}, "
                                                    f"row {sheet_row}", time)
            return Chunk(block, values, times)

        for item in self._excel_rows():
            batch.append(item)
            if len(batch) == BLOCK_ROWS:
                yield flush()
                count += 1
                batch = []
        if batch or not count:
            yield flush()

    def _excel_number(self, value, sheet_row: int, column: str) -> float:
        if value is None or (isinstance(value, str) and value.strip() in MISSING):
            return math.nan
        where = f"{self.path}: sheet {self.sheet!r}, row {sheet_row}, column {column!r}"
        if isinstance(value, bool) or not isinstance(value, int | float | str):
            raise UserError(f"{where}: {value!r} is not a number")
        try:
            v = float(value.strip().replace(",", ".") if isinstance(value, str) else value)
        except ValueError:
            raise UserError(f"{where}: {value!r} is not a number") from None
        if not math.isfinite(v):
            raise UserError(f"{where}: {value!r} is not a finite number")
        return v

    # -- times ---------------------------------------------------------------------------
    def _one_time(self, value, where: str, column: str) -> float:
        if value is None or (isinstance(value, str) and value.strip() in MISSING):
            return math.nan
        try:
            v = _time_value(value)
        except (ValueError, TypeError):
            raise UserError(f"{where}, column {column!r}: {value!r} is neither an ISO 8601 "
                            "time nor a number") from None
        if not math.isfinite(v):
            raise UserError(f"{where}, column {column!r}: {value!r} is not a finite time")
        return v

    def _times(self, cells: list, block: Block, column: str, first_row: int = 0) -> np.ndarray:
        out = np.empty(len(cells))
        for i, cell in enumerate(cells):
            try:
                out[i] = math.nan if cell is None else _time_value(cell)
            except (ValueError, TypeError):
                where = self.where(block, i, first_row)
                raise UserError(f"{where}, column {column!r}: {cell!r} is neither an ISO 8601 "
                                "time nor a number") from None
        return out

    # -- the one way to read -------------------------------------------------------------
    def blocks(self, block_bytes: int = BLOCK_BYTES) -> list[Block]:
        """The file's independent parts, in order (CSV byte ranges, Parquet row groups)."""
        if self.kind == "csv":
            return list(self._csv_blocks(block_bytes))
        if self.kind == "parquet":
            return [Block(i, i, i + 1, 0) for i in range(self._pq.num_row_groups)]
        raise UserError(f"{self.path}: Excel files are read whole, not in blocks")

    def check_columns(self, columns: list[str], what: str = "column") -> None:
        missing = [c for c in columns if c not in self.header]
        if missing:
            raise UserError(f"{self.path}: unknown {what}(s) {', '.join(map(repr, missing))}; "
                            f"columns are {', '.join(self.header)}")

    def read_block(self, block: Block, columns: list[str], time: str | None = None,
                   first_row: int = 0) -> Chunk:
        """Numbers of ``columns`` (and the ``time`` column) in one block."""
        if self.kind == "csv":
            return self._csv_chunk(block, columns, time)
        return self._parquet_chunk(block, columns, time, first_row)

    def chunks(self, columns: list[str], time: str | None = None,
               block_bytes: int = BLOCK_BYTES) -> Iterator[Chunk]:
        """Read ``columns`` block by block, in file order. Columns are checked first."""
        self.check_columns(columns + ([time] if time else []))
        if self.kind == "excel":
            yield from self._excel_chunks(columns, time)
            return
        first_row = 0
        blocks = self._csv_blocks(block_bytes) if self.kind == "csv" else self.blocks()
        for block in blocks:
            chunk = self.read_block(block, columns, time, first_row)
            first_row += chunk.values.shape[0]
            yield chunk

    def numeric_probe(self, columns: list[str]) -> list[str]:
        """Names among ``columns`` whose first block holds a cell that is not a number."""
        if self.kind == "parquet":
            import pyarrow as pa

            schema = self._pq.schema_arrow
            return [c for c in columns if not (pa.types.is_integer(schema.field(c).type)
                                               or pa.types.is_floating(schema.field(c).type))]
        if self.kind == "excel":
            rows = []
            for _, row in self._excel_rows():
                rows.append(row)
                if len(rows) == 200:
                    break
            cells = {c: [r[self.header.index(c)] if self.header.index(c) < len(r) else None
                         for r in rows] for c in columns}
            return [c for c, vals in cells.items() if _mostly_text(vals, ",")]
        block = next(self._csv_blocks(1 << 16), None)
        if block is None:
            return []
        text = self._read_csv_bytes(block).decode("utf-8", errors="replace")
        rows = [r for r in csv.reader(io.StringIO(text), delimiter=self.sep) if r][:200]
        cells = {c: [r[self.header.index(c)] if self.header.index(c) < len(r) else ""
                     for r in rows] for c in columns}
        return [c for c, vals in cells.items() if _mostly_text(vals, self.decimal)]
