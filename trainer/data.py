"""Reading tabular measurements: CSV with a header row (Parquet when pyarrow is installed).

Every refusal is one line naming the file line and column at fault, so a user can open the
file and find it.
"""

from __future__ import annotations

import csv
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from service.store import sha256_file
from trainer.errors import UserError

MIN_ROWS = 3


@dataclass
class Table:
    """Numeric columns read from a file; ``values[:, j]`` is column ``columns[j]``."""

    columns: list[str]
    values: np.ndarray
    sha256: str
    path: str

    def select(self, names: list[str]) -> np.ndarray:
        index = {c: j for j, c in enumerate(self.columns)}
        return self.values[:, [index[n] for n in names]]


def _check_header(header: list[str], path: Path) -> list[str]:
    header = [h.strip() for h in header]
    seen: dict[str, int] = {}
    for j, name in enumerate(header):
        if not name:
            raise UserError(f"{path}: line 1, column {j + 1} has an empty name")
        if name in seen:
            raise UserError(
                f"{path}: line 1: column name {name!r} appears twice "
                f"(columns {seen[name] + 1} and {j + 1})"
            )
        seen[name] = j
    return header


def to_float(
    rows: list[list[str]], header: list[str], first_line: int, path,
    lines: list[int] | None = None,
) -> np.ndarray:
    """Convert string cells to float64, or name the first bad cell (line and column).

    ``lines[i]`` is the file line on which ``rows[i]`` starts; without it rows are taken to
    sit on consecutive lines from ``first_line`` (no blank lines, no multi-line cells).
    """
    width = len(header)

    def line(i: int) -> int:
        return lines[i] if lines is not None else first_line + i

    for i, row in enumerate(rows):
        if len(row) != width:
            raise UserError(
                f"{path}: line {line(i)} has {len(row)} cells, the header has {width}"
            )
    try:
        values = np.array(rows, dtype=np.float64) if rows else np.empty((0, width))
        if np.isfinite(values).all():
            return values.reshape(len(rows), width)
    except ValueError:
        values = None
    for i, row in enumerate(rows):
        for j, cell in enumerate(row):
            where = f"{path}: line {line(i)}, column {header[j]!r}"
            text = cell.strip()
            if not text or text.lower() in ("nan", "na", "null", "none"):
                raise UserError(f"{where}: missing value")
            try:
                v = float(text)
            except ValueError:
                raise UserError(f"{where}: {cell!r} is not a number") from None
            if not np.isfinite(v):
                raise UserError(f"{where}: {cell!r} is not a finite number")
    raise UserError(f"{path}: could not read the numbers")  # pragma: no cover


def _open_csv(path: Path):
    fh = open(path, newline="", encoding="utf-8-sig")  # noqa: SIM115 (the caller closes it)
    reader = csv.reader(fh)
    try:
        header = next(reader)
    except StopIteration:
        fh.close()
        raise UserError(f"{path}: the file is empty") from None
    except (csv.Error, UnicodeDecodeError) as exc:
        fh.close()
        raise UserError(f"{path}: not readable as CSV ({exc})") from None
    return fh, reader, _check_header(header, path)


def _check_path(path) -> Path:
    path = Path(path)
    if not path.is_file():
        raise UserError(f"{path}: no such file")
    if path.stat().st_size == 0:
        raise UserError(f"{path}: the file is empty")
    return path


def read_table(path) -> Table:
    """Read a whole CSV or Parquet file into a numeric :class:`Table`."""
    path = _check_path(path)
    digest = sha256_file(path)
    if path.suffix.lower() in (".parquet", ".pq"):
        return _read_parquet(path, digest)
    fh, reader, header = _open_csv(path)
    rows: list[list[str]] = []
    lines: list[int] = []  # file line each row starts on (blank lines are skipped)
    with fh:
        try:
            start = reader.line_num + 1
            for row in reader:
                if row:
                    rows.append(row)
                    lines.append(start)
                start = reader.line_num + 1
        except (csv.Error, UnicodeDecodeError) as exc:
            raise UserError(f"{path}: line {reader.line_num}: {exc}") from None
    values = to_float(rows, header, 2, path, lines)
    return Table(header, values, digest, str(path))


def _read_parquet(path: Path, digest: str) -> Table:
    try:
        import pyarrow.parquet as pq
    except ImportError:
        raise UserError(
            f"{path}: reading Parquet needs pyarrow (pip install 'kridge[parquet]')"
        ) from None
    table = pq.read_table(path)
    header = _check_header(list(table.column_names), path)
    cols = []
    for name in header:
        col = table.column(name)
        try:
            arr = col.to_numpy(zero_copy_only=False).astype(np.float64)
        except (TypeError, ValueError):
            raise UserError(f"{path}: column {name!r} is not numeric ({col.type})") from None
        bad = np.flatnonzero(~np.isfinite(arr))
        if bad.size:
            raise UserError(f"{path}: row {bad[0] + 1}, column {name!r}: missing or not finite")
        cols.append(arr)
    values = np.column_stack(cols) if cols else np.empty((0, 0))
    return Table(header, values, digest, str(path))


def iter_csv_chunks(
    path, columns: list[str], chunk_rows: int = 50_000
) -> Iterator[tuple[int, np.ndarray]]:
    """Stream a CSV in chunks: yields (first data row index, values of ``columns``).

    Only ``columns`` are converted; other columns may hold anything. Memory stays bounded by
    the chunk size, so a file larger than memory can be scored. The file and its header are
    checked here, before the first chunk is asked for, so a caller can refuse a file before
    writing any output.
    """
    path = _check_path(path)
    fh, reader, header = _open_csv(path)
    missing = [c for c in columns if c not in header]
    if missing:
        fh.close()
        raise UserError(f"{path}: missing feature column(s) {', '.join(map(repr, missing))}")
    return _chunks(path, fh, reader, header, columns, chunk_rows)


def _chunks(path, fh, reader, header, columns, chunk_rows) -> Iterator[tuple[int, np.ndarray]]:
    idx = [header.index(c) for c in columns]
    with fh:
        done = 0
        rows: list[list[str]] = []
        lines: list[int] = []
        start = reader.line_num + 1
        try:
            for row in reader:
                if not row:
                    start = reader.line_num + 1
                    continue
                if len(row) != len(header):
                    raise UserError(
                        f"{path}: line {start} has {len(row)} cells, "
                        f"the header has {len(header)}"
                    )
                rows.append([row[j] for j in idx])
                lines.append(start)
                start = reader.line_num + 1
                if len(rows) == chunk_rows:
                    yield done, to_float(rows, columns, done + 2, path, lines)
                    done += len(rows)
                    rows, lines = [], []
        except (csv.Error, UnicodeDecodeError) as exc:
            raise UserError(f"{path}: line {reader.line_num}: {exc}") from None
        if rows or not done:
            yield done, to_float(rows, columns, done + 2, path, lines)


def split_columns(
    table: Table, targets: list[str], features: list[str] | None
) -> tuple[list[str], np.ndarray, np.ndarray]:
    """Resolve feature and target names and check the data is fit for training.

    Returns (feature names, X, Y) with Y of shape (n, t).
    """
    path = table.path
    known = set(table.columns)
    for group, names in (("target", targets), ("feature", features or [])):
        if len(set(names)) != len(names):
            raise UserError(f"{group} columns list a name twice: {', '.join(names)}")
        unknown = [n for n in names if n not in known]
        if unknown:
            raise UserError(
                f"{path}: unknown {group} column(s) {', '.join(map(repr, unknown))}; "
                f"columns are {', '.join(table.columns)}"
            )
    if features is None:
        features = [c for c in table.columns if c not in targets]
    overlap = set(features) & set(targets)
    if overlap:
        raise UserError(f"column(s) {', '.join(sorted(overlap))} cannot be feature and target")
    if not features:
        raise UserError(f"{path}: no feature columns left besides the target(s)")
    n = table.values.shape[0]
    if n < MIN_ROWS:
        raise UserError(f"{path}: {n} data row(s); training needs at least {MIN_ROWS}")
    y = table.select(targets)
    for j, name in enumerate(targets):
        if np.ptp(y[:, j]) == 0:
            raise UserError(f"{path}: target column {name!r} is constant ({y[0, j]:g})")
    return features, table.select(features), y
