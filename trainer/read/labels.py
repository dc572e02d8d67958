"""A column read as text labels, one per data row in file order (``--group COL``).

Groups are names (a mix, a batch, a sample id) as often as numbers, so the column is read
as text: CSV through pyarrow with the column typed as a string (the same blocks and
options as the numeric reader, so row i here is row i there), Parquet's column as stored,
Excel's cells as the sheet holds them. A number is written as its text (12 and 12.0 are
two labels in CSV, as written; one in a typed Parquet column).
"""

from __future__ import annotations

import io

from trainer.read.cells import MISSING


def csv_labels(file, column: str) -> list[str | None]:
    """Every data row's cell of ``column`` in a CSV file (None: empty)."""
    import pyarrow as pa
    import pyarrow.csv as pcsv

    out: list[str | None] = []
    for block in file.blocks():
        raw = file.read_bytes(block)
        table = pcsv.read_csv(
            io.BytesIO(raw),
            read_options=pcsv.ReadOptions(column_names=file.header, use_threads=False),
            parse_options=pcsv.ParseOptions(delimiter=file.sep,
                                            newlines_in_values=b'"' in raw),
            convert_options=pcsv.ConvertOptions(
                include_columns=[column], column_types={column: pa.string()},
                null_values=MISSING, strings_can_be_null=True,
                quoted_strings_can_be_null=True))
        out += table.column(column).to_pylist()
    return out


def parquet_labels(file, column: str) -> list[str | None]:
    """Every row's cell of ``column`` in a Parquet file, as text (None: null)."""
    out: list[str | None] = []
    for i in range(file.pq.num_row_groups):
        cells = file.pq.read_row_group(i, columns=[column]).column(column).to_pylist()
        out += [None if c is None else str(c) for c in cells]
    return out


def excel_labels(file, column: str) -> list[str | None]:
    """Every data row's cell of ``column`` on the first sheet, as text (None: empty)."""
    j = file.header.index(column)
    out: list[str | None] = []
    for _, row in file.rows():
        cell = row[j] if j < len(row) else None
        out.append(None if cell is None or str(cell).strip() == "" else str(cell))
    return out
