"""One streaming reader for every input: CSV (any common dialect), Parquet and Excel.

Numbers are parsed by pyarrow (CSV: multi-threaded, typed; Parquet: row groups) and Excel by
openpyxl in read-only mode. A file is read in blocks, so a file larger than memory can be
trained on or scored; only the columns asked for are converted. A cell that is not a number
stops the read with the file line (or sheet row) and the column.

:class:`Source` is the one entry point; the formats live in :mod:`.csv_dialect` and
:mod:`.csv_blocks` (CSV), :mod:`.tables` (Parquet, Excel), and what they share (blocks,
missing values, times) in :mod:`.cells`.
"""

from __future__ import annotations

from collections.abc import Iterator

from service.store import sha256_file
from trainer.errors import UserError
from trainer.read.cells import (
    BLOCK_ROWS,
    MISSING,
    Block,
    Chunk,
    check_path,
    is_missing,
    parse_time_text,
)
from trainer.read.csv_blocks import BLOCK_BYTES, CsvFile
from trainer.read.csv_dialect import SEPARATORS, detect
from trainer.read.dates import TimeRule, decide, given_format
from trainer.read.tables import ExcelSheet, ParquetTable

__all__ = ["BLOCK_BYTES", "BLOCK_ROWS", "MISSING", "SEPARATORS", "Block", "Chunk", "Source",
           "parse_time_text"]


class Source:
    """An input file, opened and its header checked; read it with :meth:`chunks`.

    Parameters
    ----------
    path : CSV (``.csv``, ``.txt``, ``.tsv`` or anything else), ``.parquet``/``.pq`` or
        ``.xlsx``/``.xlsm``.
    sep, decimal : CSV separator and decimal mark; detected from the first lines when None.
    time_rule : how the time column reads (from :meth:`settle_time`, e.g. on a Dask worker).
    """

    def __init__(self, path, sep: str | None = None, decimal: str | None = None,
                 time_rule: TimeRule | None = None):
        self.path = check_path(path)
        suffix = self.path.suffix.lower()
        self.kind = {".parquet": "parquet", ".pq": "parquet", ".xlsx": "excel",
                     ".xlsm": "excel"}.get(suffix, "csv")
        self._sha256: str | None = None
        self.sep, self.decimal = ",", "."
        self._file: CsvFile | ParquetTable | ExcelSheet
        if self.kind == "csv":
            self._file = CsvFile(self.path, detect(self.path, sep, decimal))
            self.sep, self.decimal = self._file.sep, self._file.decimal
        elif self.kind == "parquet":
            self._file = ParquetTable(self.path)
        else:
            self._file = ExcelSheet(self.path)
            self.sheet = self._file.sheet
        self.header: list[str] = self._file.header
        if time_rule is not None:
            self._file.time_rule = time_rule

    @property
    def time_rule(self) -> TimeRule:
        return self._file.time_rule

    def settle_time(self, time: str, time_format: str | None = None) -> TimeRule:
        """Decide once how column ``time`` reads (:mod:`trainer.read.dates`) and keep it.

        With ``time_format`` that format; else ISO 8601 or numbers, or written dates whose
        day/month order the whole column shows. Reads only the time column, and past its
        first block only when that block holds a written date.
        """
        self.check_columns([time], "time column")
        if time_format is not None:
            rule = given_format(time_format)
        else:
            rule = decide(self._time_texts(time), time, str(self.path))
        self._file.time_rule = rule
        return rule

    def _time_texts(self, time: str):
        """(text, where) of the time column's text cells, stopping after the first block
        when it holds only ISO stamps, numbers and typed times."""
        first_row = 0
        for n, chunk in enumerate(self.chunks([], cells=[time])):
            written = False
            for i, cell in enumerate(chunk.cells[0]):
                if isinstance(cell, str) and not is_missing(cell):
                    written = written or _is_written_date(cell)
                    yield cell, (lambda b=chunk.block, r=i, f=first_row: self.where(b, r, f))
            first_row += chunk.values.shape[0]
            if n == 0 and not written:
                return

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
        if isinstance(self._file, ParquetTable):
            return f"{self.path}: row {first_row + row + 1}"
        return self._file.where(block, row)

    def dialect(self) -> dict:
        """What was used to read the file (for the manifest)."""
        out = {"format": self.kind}
        if self.kind == "csv":
            out.update(separator=self.sep, decimal=self.decimal)
        if self.kind == "excel":
            out["sheet"] = self.sheet
        return out

    # -- the one way to read -------------------------------------------------------------
    def blocks(self, block_bytes: int = BLOCK_BYTES) -> list[Block]:
        """The file's independent parts, in order (CSV byte ranges, Parquet row groups)."""
        if isinstance(self._file, CsvFile):
            return list(self._file.blocks(block_bytes))
        if isinstance(self._file, ParquetTable):
            return self._file.blocks()
        raise UserError(f"{self.path}: Excel files are read whole, not in blocks")

    def check_columns(self, columns: list[str], what: str = "column") -> None:
        missing = [c for c in columns if c not in self.header]
        if missing:
            raise UserError(f"{self.path}: unknown {what}(s) {', '.join(map(repr, missing))}; "
                            f"columns are {', '.join(self.header)}")

    def read_block(self, block: Block, columns: list[str], time: str | None = None,
                   first_row: int = 0, cells: list[str] | None = None) -> Chunk:
        """Numbers of ``columns`` (and the ``time`` column) in one block; the ``cells``
        columns as the file holds them (:attr:`Chunk.cells`)."""
        if isinstance(self._file, CsvFile):
            return self._file.chunk(block, columns, time, cells)
        if isinstance(self._file, ParquetTable):
            return self._file.chunk(block, columns, time, first_row, cells)
        raise UserError(f"{self.path}: Excel files are read whole, not in blocks")

    def chunks(self, columns: list[str], time: str | None = None,
               block_bytes: int = BLOCK_BYTES, cells: list[str] | None = None
               ) -> Iterator[Chunk]:
        """Read ``columns`` block by block, in file order. Columns are checked first.

        ``cells`` names columns wanted as the file holds them, unparsed (:attr:`Chunk.cells`).
        """
        self.check_columns(columns + ([time] if time else []) + list(cells or []))
        if isinstance(self._file, ExcelSheet):
            yield from self._file.chunks(columns, time, cells)
            return
        first_row = 0
        blocks = (self._file.blocks(block_bytes) if isinstance(self._file, CsvFile)
                  else self._file.blocks())
        for block in blocks:
            chunk = self.read_block(block, columns, time, first_row, cells)
            first_row += chunk.values.shape[0]
            yield chunk

    def labels(self, column: str) -> list[str | None]:
        """Every data row's cell of ``column`` as text, in file order (None: empty);
        :mod:`trainer.read.labels`."""
        from trainer.read import labels

        self.check_columns([column], "group column")
        reader = {"csv": labels.csv_labels, "parquet": labels.parquet_labels,
                  "excel": labels.excel_labels}[self.kind]
        return reader(self._file, column)

    def numeric_probe(self, columns: list[str]) -> list[str]:
        """Names among ``columns`` whose first block holds mostly cells that are not numbers
        (Parquet: whose type is not numeric)."""
        return self._file.numeric_probe(columns)


def _is_written_date(text: str) -> bool:
    try:
        parse_time_text(text)
        return False
    except ValueError:
        return True
