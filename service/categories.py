"""Text features, encoded one-hot: the manifest's ``categories`` and how rows are encoded.

A text feature (a shift, a product grade, a line) with the categories c₁ < … < c_k seen in
the training rows (sorted, at most :data:`MAX_CATEGORIES`) becomes k columns
``feature=c₁`` … ``feature=c_k``, 1.0 in the row's category's column and 0.0 in the others,
in place of the feature; number features stay one column each. The encoded columns are then
standardized like any feature (training mean and population standard deviation), which is
what scikit-learn's ``OneHotEncoder`` followed by ``StandardScaler`` computes.

A category the training rows never had encodes as all zeros and the row is flagged outside
the envelope: ``"inside": false`` and ``"new_category": {feature: value}``. Its prediction
is an extrapolation.

numpy only: the service uses this module.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

#: Most categories a text feature may have (more is refused at training, naming the column):
#: beyond a few dozen, one-hot columns outnumber what a kernel model of lab-sized data learns.
MAX_CATEGORIES = 50


class ValueKindError(ValueError):
    """A row's value of the wrong kind: text for a number feature or the reverse."""

    def __init__(self, row: int, feature: str, message: str):
        super().__init__(f"row {row}, feature {feature!r}: {message}")
        self.row, self.feature = row, feature


def encoded_name(feature: str, category: str) -> str:
    return f"{feature}={category}"


class Categories:
    """The encoding of one model's features (``categories``: text feature → categories).

    Attributes
    ----------
    features : the model's input columns, as the manifest lists them.
    columns : the encoded columns, in the order of the model's arrays.
    """

    def __init__(self, features: Sequence[str], categories: dict[str, list[str]] | None):
        self.features = list(features)
        self.categories = {f: list(c) for f, c in (categories or {}).items()}
        self.columns: list[str] = []
        self.slots: list[tuple[int, int]] = []  # per feature: first encoded column, width
        for f in self.features:
            cats = self.categories.get(f)
            self.slots.append((len(self.columns), len(cats) if cats is not None else 1))
            self.columns += ([encoded_name(f, c) for c in cats] if cats is not None else [f])
        self.index = {f: {c: k for k, c in enumerate(cats)} for f, cats in
                      self.categories.items()}

    @property
    def any(self) -> bool:
        return bool(self.categories)

    def is_text(self, feature: str) -> bool:
        return feature in self.categories

    def number_mask(self) -> np.ndarray:
        """(D,) True for encoded columns that are number features (ranges apply)."""
        mask = np.ones(len(self.columns), dtype=bool)
        for f, (start, width) in zip(self.features, self.slots, strict=True):
            if f in self.categories:
                mask[start:start + width] = False
        return mask

    def encode(self, rows: Sequence[Sequence]) -> tuple[np.ndarray, list[dict[str, str]]]:
        """Rows of raw values in :attr:`features` order (text features as strings, numbers
        as numbers) → ((m, D) float array, per row the text values never seen in training).

        :class:`ValueKindError` (a ValueError) naming row and feature when a text feature's
        value is not a string or a number feature's is not a number.
        """
        out = np.zeros((len(rows), len(self.columns)))
        unseen: list[dict[str, str]] = []
        for i, row in enumerate(rows):
            new: dict[str, str] = {}
            for f, (start, _), v in zip(self.features, self.slots, row, strict=True):
                index = self.index.get(f)
                if index is None:
                    if isinstance(v, str | bool) or v is None:
                        raise ValueKindError(i, f, f"{v!r} is not a number")
                    out[i, start] = v
                elif not isinstance(v, str):
                    raise ValueKindError(i, f, "a text feature takes its category as a "
                                               f"string, not {v!r}")
                elif v.strip() in index:
                    out[i, start + index[v.strip()]] = 1.0
                else:
                    new[f] = v
            unseen.append(new)
        return out, unseen


def flag_new(envelopes: list[dict], unseen: list[dict[str, str]]) -> None:
    """Mark rows whose text features hold a category never seen in training."""
    for env, new in zip(envelopes, unseen, strict=True):
        if new:
            env["inside"] = False
            env["new_category"] = new
            env["flagged_by"].append("category")
