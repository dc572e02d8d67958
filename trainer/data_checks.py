"""What the input rows themselves say before any fit: repeated rows.

A set with repeated input rows (the same mix measured twice, a historian writing a reading
several times) gives a random holdout exact copies of training rows: the model has seen
those inputs, so its holdout error is optimistic. The count is recorded in the manifest's
``training.duplicates`` and warned about (:mod:`trainer.cautions`).
"""

from __future__ import annotations

import numpy as np


def _row_keys(x: np.ndarray) -> np.ndarray:
    """One hashable key per row: its bytes (−0.0 made 0.0, so equal numbers are equal)."""
    x = np.ascontiguousarray(x + 0.0, dtype=np.float64)
    return x.view(np.dtype((np.void, x.dtype.itemsize * x.shape[1]))).ravel()


def duplicate_rows(x: np.ndarray, train: np.ndarray, holdout: np.ndarray) -> dict:
    """Rows, distinct input rows, and holdout rows whose inputs equal a training row's.

    Parameters
    ----------
    x : (n, d) raw inputs of every usable row.
    train, holdout : row indices of the training part and of the holdout.
    """
    keys = _row_keys(x)
    seen = set(keys[train].tolist())
    return {"rows": int(x.shape[0]), "distinct": int(np.unique(keys).size),
            "holdout_rows": int(holdout.size),
            "holdout_with_copy": int(sum(k in seen for k in keys[holdout].tolist())),
            "how": "exact equality of all feature values"}
