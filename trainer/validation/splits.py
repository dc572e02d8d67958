"""Every split of a training job's rows: the exact job's holdout, the Nyström job's parts.

Both solvers draw their held-out rows here. Random splits are seeded; with ``--time`` the
held-out rows are the latest ones. A Nyström row's part is decided by one seeded uniform
key per row (:func:`part_keys`), which pass 1 keeps for its sample and pass 2 draws again,
so the landmarks and tuning rows taken from the sample are training-part rows.
"""

from __future__ import annotations

import numpy as np

from trainer.errors import UserError
from trainer.read.columns import MIN_ROWS

#: Caps on the parts held out of the final fit (their rows are kept in memory).
HOLDOUT_MAX, CALIBRATE_MAX, VALIDATE_MAX = 20_000, 10_000, 10_000
CALIBRATE_FRACTION = VALIDATE_FRACTION = 0.1


def split_holdout(n: int, fraction: float, seed: int,
                  most_recent: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Split into (train indices, holdout indices): a seeded random draw, or with
    ``most_recent`` (rows in time order) the last ``fraction`` of the rows."""
    if not 0 <= fraction < 1:
        raise UserError(f"--holdout must be in [0, 1), got {fraction}")
    n_hold = int(round(n * fraction))
    if fraction > 0 and (n_hold < 1 or n - n_hold < MIN_ROWS):
        raise UserError(f"{n} rows are too few for a holdout of {fraction}; use --holdout 0")
    if most_recent:
        return np.arange(n - n_hold), np.arange(n - n_hold, n)
    perm = np.random.default_rng(seed).permutation(n)
    return np.sort(perm[n_hold:]), np.sort(perm[:n_hold])


def part_fractions(rows: int, holdout: float) -> tuple[float, float, float]:
    """(validate, holdout, calibrate) fractions of ``rows``, each capped in rows."""
    fh = min(holdout, HOLDOUT_MAX / rows) if holdout > 0 else 0.0
    fc = min(CALIBRATE_FRACTION, CALIBRATE_MAX / rows)
    fv = min(VALIDATE_FRACTION, VALIDATE_MAX / rows)
    return fv, fh, fc


def time_cuts(times: np.ndarray, fv: float, fh: float, fc: float) -> tuple[float, float, float]:
    """Start times of validate, calibrate and holdout parts: the latest stretches in time."""
    q = np.quantile(times, [1 - fh - fc - fv, 1 - fh - fc, 1 - fh])
    return float(q[0]), float(q[1]), float(q[2])


def part_keys(seed: int, block_index: int, n_rows: int) -> np.ndarray:
    """The seeded uniform draw that decides the part of every row of a block.

    Pass 1 keeps the keys of its sample rows and pass 2 draws them again, so both passes put
    a row in the same part: sample rows outside the training part never become landmarks or
    tuning rows.
    """
    return np.random.default_rng([seed, 2, block_index]).random(n_rows)


def parts_of_keys(u: np.ndarray, fractions: tuple[float, float, float]) -> np.ndarray:
    """Part index of rows with keys ``u``: validate, holdout, calibrate below their
    cumulative fractions, train above."""
    fv, fh, fc = fractions
    out = np.zeros(u.shape[0], dtype=np.int8)
    out[u < fv + fh + fc] = 3
    out[u < fv + fh] = 2
    out[u < fv] = 1
    return out

