"""Text features while reading the training rows: codes per block, one-hot at the end.

A text feature's cells are read as written (:attr:`trainer.read.cells.Chunk.cells`) and
given a code per distinct text as blocks arrive (an empty cell, or a usual spelling of
missing, is a missing value like an empty number). Once every row is read, the categories
are those of the rows kept for the fit, sorted; more than
:data:`service.categories.MAX_CATEGORIES` is refused naming the column. The codes then
become the one-hot columns of :class:`service.categories.Categories`.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from service.categories import MAX_CATEGORIES, Categories
from trainer.errors import UserError
from trainer.read.cells import Chunk, is_missing


class CodeBook:
    """Codes of the text features' cells, block after block."""

    def __init__(self, features: Sequence[str], text: Sequence[str]):
        self.features = list(features)
        self.text = list(text)
        self.numbers = [f for f in self.features if f not in self.text]
        self.codes: dict[str, dict[str, int]] = {f: {} for f in self.text}

    def merge(self, chunk: Chunk, targets: Sequence[str]) -> Chunk:
        """The chunk of ``numbers + targets`` (values) and ``text`` (cells) as one of
        ``features + targets`` whose text columns hold codes (NaN: missing)."""
        m = chunk.values.shape[0]
        d = len(self.features)
        values = np.empty((m, d + len(targets)))
        values[:, d:] = chunk.values[:, len(self.numbers):]
        cells = dict(zip(self.text, chunk.cells or [], strict=True))
        k = 0
        for j, f in enumerate(self.features):
            if f in cells:
                values[:, j] = self._codes(f, cells[f])
            else:
                values[:, j] = chunk.values[:, k]
                k += 1
        return Chunk(chunk.block, values, chunk.time)

    def _codes(self, feature: str, cells: list) -> np.ndarray:
        book = self.codes[feature]
        out = np.empty(len(cells))
        for i, cell in enumerate(cells):
            if is_missing(cell):
                out[i] = np.nan
                continue
            text = cell.strip() if isinstance(cell, str) else str(cell)
            out[i] = book.setdefault(text, len(book))
        return out

    def encode(self, x: np.ndarray, path) -> tuple[np.ndarray, Categories]:
        """Rows of codes (n, d), the kept rows only → ((n, D) one-hot rows, encoding)."""
        categories = {}
        for f in self.text:
            j = self.features.index(f)
            names = {code: text for text, code in self.codes[f].items()}
            seen = sorted(names[int(c)] for c in np.unique(x[:, j]))
            if len(seen) > MAX_CATEGORIES:
                raise UserError(f"{path}: text feature {f!r} has {len(seen)} categories in the "
                                f"training rows, more than the {MAX_CATEGORIES} one-hot "
                                "encoding takes; leave it out of --features or group its "
                                "values")
            categories[f] = seen
        encoding = Categories(self.features, categories)
        out = np.zeros((x.shape[0], len(encoding.columns)))
        for j, (f, (start, _)) in enumerate(zip(self.features, encoding.slots, strict=True)):
            if f not in categories:
                out[:, start] = x[:, j]
                continue
            names = {code: text for text, code in self.codes[f].items()}
            where = {c: k for k, c in enumerate(categories[f])}
            # code → position among the kept rows' categories (every kept row's code has one)
            lookup = np.array([where.get(names[c], -1) for c in range(len(names))])
            out[np.arange(x.shape[0]), start + lookup[x[:, j].astype(int)]] = 1.0
        return out, encoding
