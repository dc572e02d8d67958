"""Training and scoring data: which columns, which rows, and what missing values mean.

The bytes are read by :mod:`trainer.read.source` (CSV in any common dialect, Parquet, Excel).
This module decides what the numbers are for:

* only the named features, targets and time column are read; other columns are ignored;
* a row whose target is empty is left out and counted (the normal shape of soft-sensor data:
  lab values exist for a few rows only); with several targets a row needs every one;
* a missing feature value is refused with its line and column, unless ``drop_incomplete``
  leaves those rows out (counted too). Nothing is ever imputed.

Every refusal is one line naming the file line (or sheet row) and the column at fault.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field

import numpy as np

from service.categories import Categories
from service.text_safety import name_refusal
from trainer.errors import UserError
from trainer.read.categorical import CodeBook
from trainer.read.source import BLOCK_BYTES, Chunk, Source

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
        # C order, as the training reader gives: column sums run in another order on a
        # Fortran-ordered array, and the standardization would differ in the last bit
        return np.ascontiguousarray(self.values[:, [index[n] for n in names]])


@dataclass
class TrainingData:
    """The rows a model is fitted on, with an account of the rows left out."""

    features: list[str]
    targets: list[str]
    x: np.ndarray  # (n, d)
    y: np.ndarray  # (n, t)
    time: np.ndarray | None  # (n,) seconds since 1970 UTC (ISO input) or the column's numbers
    sha256: str
    path: str
    counts: dict = field(default_factory=dict)
    dialect: dict = field(default_factory=dict)
    time_column: str | None = None
    time_is_clock: bool = False  # the time column held ISO 8601 stamps (not plain numbers)
    encoding: Categories | None = None  # text features: x holds their one-hot columns
    groups: np.ndarray | None = None  # (n,) int: the --group label of each row, as a code
    group_names: list[str] | None = None  # the labels, in code order


def _refuse_missing(src: Source, chunk: Chunk, values: np.ndarray, names: list[str],
                    first_row: int, what: str = "missing value") -> None:
    i, j = np.argwhere(np.isnan(values))[0]
    raise UserError(f"{src.where(chunk.block, int(i), first_row)}, column {names[j]!r}: {what}")


def read_table(path, sep: str | None = None, decimal: str | None = None) -> Table:
    """Read every column of a file as numbers (no missing values allowed)."""
    src = Source(path, sep, decimal)
    parts = []
    first_row = 0
    for chunk in src.chunks(src.header):
        if np.isnan(chunk.values).any():
            _refuse_missing(src, chunk, chunk.values, src.header, first_row)
        parts.append(chunk.values)
        first_row += chunk.values.shape[0]
    values = np.concatenate(parts) if parts else np.empty((0, len(src.header)))
    return Table(src.header, values, src.sha256, str(src.path))


def iter_chunks(path, columns: list[str], sep: str | None = None, decimal: str | None = None,
                block_bytes: int = BLOCK_BYTES) -> Iterator[tuple[int, np.ndarray]]:
    """Stream ``columns`` of a file: yields (first data row index, values), no missing values.

    The file and its header are checked before the first chunk is asked for, so a caller can
    refuse a file before writing any output. Memory stays bounded by the block size.
    """
    src = Source(path, sep, decimal)
    missing = [c for c in columns if c not in src.header]
    if missing:
        raise UserError(f"{src.path}: missing feature column(s) {', '.join(map(repr, missing))}")
    return _chunks(src, columns, block_bytes)


def _chunks(src: Source, columns: list[str], block_bytes: int) -> Iterator[tuple[int, np.ndarray]]:
    done = 0
    for chunk in src.chunks(columns, block_bytes=block_bytes):
        if np.isnan(chunk.values).any():
            _refuse_missing(src, chunk, chunk.values, columns, done)
        yield done, chunk.values
        done += chunk.values.shape[0]


def usable_rows(src: Source, chunk: Chunk, features: list[str], time: str | None,
                first_row: int, drop_incomplete: bool
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(keep, has_target, incomplete-with-target) masks of a chunk of features + targets.

    A row with every target but a missing input (or time) is refused by line and column
    unless ``drop_incomplete``; rows without a target are simply not kept.
    """
    d = len(features)
    v = chunk.values
    has_target = ~np.isnan(v[:, d:]).any(axis=1)
    incomplete = np.isnan(v[:, :d]).any(axis=1)
    if chunk.time is not None:
        incomplete |= np.isnan(chunk.time)
    bad = has_target & incomplete
    if bad.any() and not drop_incomplete:
        i = int(np.flatnonzero(bad)[0])
        cols = features + ([time] if time else [])
        cells = np.append(v[i, :d], chunk.time[i] if chunk.time is not None else 0.0)
        j = int(np.flatnonzero(np.isnan(cells))[0])
        raise UserError(f"{src.where(chunk.block, i, first_row)}, column {cols[j]!r}: missing "
                        "value (give --drop-incomplete to leave such rows out)")
    return has_target & ~incomplete, has_target, bad


def row_counts(read: int, with_target: int, dropped: int, used: int,
               targets: list[str]) -> dict:
    """The account of rows read, with a target, left out and used (manifest, inspect)."""
    return {
        "rows_read": read,
        "rows_with_target": with_target,
        "rows_dropped_incomplete": dropped,
        "rows_used": used,
        "summary": (f"{with_target} of {read} rows have a value for {' and '.join(targets)}"
                    + (f"; {dropped} of them left out for a missing input" if dropped else "")),
    }


def feature_names(src: Source, targets: list[str], features: list[str] | None,
           time: str | None, group: str | None = None) -> list[str]:
    """Resolve and check feature names; the default is every other numeric column.

    Every name used (targets, features, time, group) must pass
    :func:`service.text_safety.name_refusal`.
    """
    for role, names in (("target", targets), ("feature", features or [])):
        if len(set(names)) != len(names):
            raise UserError(f"{role} columns list a name twice: {', '.join(names)}")
        src.check_columns(names, f"{role} column")
    if time is not None:
        src.check_columns([time], "time column")
        if time in targets or (features and time in features):
            raise UserError(f"column {time!r} cannot be the time column and a feature or target")
    if group is not None:
        src.check_columns([group], "group column")
        if group in targets or (features and group in features) or group == time:
            raise UserError(f"column {group!r} cannot be the group column and a feature, "
                            "target or the time column")
    if features is None:
        features = [c for c in src.header if c not in targets and c not in (time, group)]
        odd = src.numeric_probe(features)
        if odd:
            raise UserError(
                f"{src.path}: column(s) {', '.join(map(repr, odd))} are not numeric; name the "
                "inputs with --features (other columns are then ignored; a text column named "
                "there is encoded one-hot)"
                + ("" if time else ", or give a timestamp column with --time"))
    overlap = set(features) & set(targets)
    if overlap:
        raise UserError(f"column(s) {', '.join(sorted(overlap))} cannot be feature and target")
    if not features:
        raise UserError(f"{src.path}: no feature columns left besides the target(s)")
    refusal = name_refusal([*targets, *features, *([time] if time else []),
                            *([group] if group else [])], src.header)
    if refusal:
        raise UserError(f"{src.path}: {refusal}")
    return features


def load_training(path, targets: list[str], features: list[str] | None = None,
                  time: str | None = None, drop_incomplete: bool = False,
                  sep: str | None = None, decimal: str | None = None,
                  time_format: str | None = None) -> TrainingData:
    """Open ``path``, resolve the feature names and :func:`read_rows` (tests, tools)."""
    src = Source(path, sep, decimal)
    if time:
        src.settle_time(time, time_format)
    names = feature_names(src, targets, features, time)
    return read_rows(src, targets, names, time, drop_incomplete,
                     text_features(src, names) if features else ())


def group_codes(src: Source, column: str, kept: np.ndarray) -> tuple[np.ndarray, list[str]]:
    """(code per kept row, labels in code order) of the ``--group`` column; an empty cell in
    a kept row is refused with its data row."""
    cells = src.labels(column)
    mine = [cells[i] for i in kept]
    empty = [i for i, c in zip(kept, mine, strict=True) if c is None or not str(c).strip()]
    if empty:
        raise UserError(f"{src.path}: data row {empty[0] + 1}, column {column!r}: empty group "
                        "cell (every row used needs its group)")
    names, codes = np.unique(np.array(mine, dtype=object).astype(str), return_inverse=True)
    return codes.astype(np.int64), names.tolist()


def read_rows(src: Source, targets: list[str], features: list[str], time: str | None,
              drop_incomplete: bool, text: list[str] | tuple = (),
              group: str | None = None) -> TrainingData:
    """Read the rows to fit on: rows with every target present, complete features
    (``features`` already resolved by :func:`feature_names`). The ``text`` features are
    encoded one-hot (:mod:`trainer.read.categorical`): ``x`` then holds the encoded columns.

    Returns
    -------
    TrainingData with ``counts``: ``rows_read``, ``rows_with_target``,
    ``rows_dropped_incomplete`` and ``rows_used``.
    """
    targets, features = list(targets), list(features)
    d = len(features)
    xs, ys, ts, kept = [], [], [], []
    read = with_target = dropped = 0
    book = CodeBook(features, text) if text else None
    numbers = book.numbers if book else features
    for chunk in src.chunks(numbers + targets, time, cells=list(text) or None):
        if book is not None:
            chunk = book.merge(chunk, targets)
        m = chunk.values.shape[0]
        v = chunk.values
        keep, has_target, bad = usable_rows(src, chunk, features, time, read, drop_incomplete)
        xs.append(v[keep, :d])
        ys.append(v[keep, d:])
        if chunk.time is not None:
            ts.append(chunk.time[keep])
        kept.append(read + np.flatnonzero(keep))
        read += m
        with_target += int(has_target.sum())
        dropped += int(bad.sum())
    x = np.concatenate(xs) if xs else np.empty((0, d))
    y = np.concatenate(ys) if ys else np.empty((0, len(targets)))
    t = np.concatenate(ts) if time else None
    n = x.shape[0]
    if n < MIN_ROWS:
        left_out = "" if n == read else (f" usable of {read} (rows with every target: "
                                         f"{with_target}, left out for a missing input: "
                                         f"{dropped})")
        raise UserError(f"{src.path}: {n} data row(s){left_out}; training needs at least "
                        f"{MIN_ROWS}")
    for j, name in enumerate(targets):
        if np.ptp(y[:, j]) == 0:
            raise UserError(f"{src.path}: target column {name!r} is constant ({y[0, j]:g})")
    counts = row_counts(read, with_target, dropped, n, targets)
    clock = bool(time) and is_clock(src, time)
    encoding = None
    if book is not None:
        x, encoding = book.encode(x, src.path)
    codes, names = (group_codes(src, group, np.concatenate(kept)) if group else (None, None))
    return TrainingData(features, list(targets), x, y, t, src.sha256, str(src.path), counts,
                        src.dialect(), time, clock, encoding, codes, names)


def text_features(src: Source, features: list[str]) -> list[str]:
    """The named features whose cells are mostly text: encoded one-hot."""
    return src.numeric_probe(features)


def count_target_rows(src: Source, targets: list[str]) -> int:
    """Rows that have a value in every target column (reads only those columns)."""
    targets = list(targets)
    src.check_columns(targets, "target column")
    return sum(int((~np.isnan(c.values).any(axis=1)).sum()) for c in src.chunks(targets))


def is_clock(src: Source, time: str) -> bool:
    """Whether the time column holds timestamps (ISO 8601 or a date type), not numbers."""
    return bool(src.numeric_probe([time]))


def split_columns(
    table: Table, targets: list[str], features: list[str] | None
) -> tuple[list[str], np.ndarray, np.ndarray]:
    """Resolve feature and target names of an all-numeric :class:`Table` (tests, tools).

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
