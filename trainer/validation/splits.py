"""Every split of a training job's rows, decided once by the job's split stage.

:func:`split_rows` is that stage. Rows held in memory are split into index sets
(:class:`HoldoutSplit`: training part and holdout); rows read block by block get a rule
every row is put through as it is read (:class:`PartSplit`: train, validate, holdout and
calibrate parts). Random splits are seeded; with ``--time`` the held-out rows are the latest
ones. A streamed row's part is decided by one seeded uniform key per row (:func:`part_keys`),
which pass 1 keeps for its sample and pass 2 draws again, so the landmarks and tuning rows
taken from the sample are training-part rows.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

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


def split_groups(groups: np.ndarray, fraction: float, seed: int
                 ) -> tuple[np.ndarray, np.ndarray]:
    """(train indices, holdout indices) keeping every group whole: a seeded random
    ⌈fraction · G⌉ of the G groups are held out, all their rows with them (the count of
    scikit-learn's ``GroupShuffleSplit(test_size=fraction)``)."""
    if not 0 <= fraction < 1:
        raise UserError(f"--holdout must be in [0, 1), got {fraction}")
    labels = np.unique(groups)
    n_hold = math.ceil(fraction * labels.size) if fraction > 0 else 0
    if fraction > 0 and labels.size - n_hold < 2:
        raise UserError(f"{labels.size} groups are too few for a grouped holdout of "
                        f"{fraction}; use --holdout 0")
    held = np.random.default_rng([seed, 11]).permutation(labels)[:n_hold]
    out = np.isin(groups, held)
    if fraction > 0 and int((~out).sum()) < MIN_ROWS:
        raise UserError(f"{int((~out).sum())} training rows left by a grouped holdout of "
                        f"{fraction}; use --holdout 0")
    return np.flatnonzero(~out), np.flatnonzero(out)


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



@dataclass(frozen=True)
class HoldoutSplit:
    """Rows in memory: training-part and holdout indices."""

    train: np.ndarray
    holdout: np.ndarray
    by_time: bool
    groups: np.ndarray | None = None  # every row's group code (--group), else None

    @property
    def kind(self) -> str:
        if self.groups is not None:
            return "seeded random draw of whole groups"
        return "the most recent rows in time" if self.by_time else "seeded random draw"


@dataclass(frozen=True)
class PartSplit:
    """Streamed rows: the part of each row follows from its key or its time."""

    fractions: tuple[float, float, float]  # validate, holdout, calibrate (random parts)
    cuts: tuple[float, float, float] | None  # validate, calibrate, holdout start times

    @property
    def by_time(self) -> bool:
        return self.cuts is not None

    @property
    def kind(self) -> str:
        return ("the most recent rows in time" if self.by_time
                else "seeded random draw per block")

    def parts(self, keys: np.ndarray, times: np.ndarray | None) -> np.ndarray:
        """Part index (0 train, 1 validate, 2 holdout, 3 calibrate) of rows with part keys
        ``keys`` (:func:`part_keys`) and, with ``--time``, times ``times``."""
        if self.cuts is None:
            return parts_of_keys(keys, self.fractions)
        out = np.zeros(keys.shape[0], dtype=np.int8)
        v_cut, c_cut, h_cut = self.cuts
        out[times >= v_cut] = 1
        out[times >= c_cut] = 3
        out[times >= h_cut] = 2
        return out

    def training_share(self) -> float:
        """The share of rows the training part gets."""
        return 1 - sum(self.fractions)


def split_rows(count: int, times: np.ndarray | None, holdout: float, seed: int,
               in_memory: bool, groups: np.ndarray | None = None) -> HoldoutSplit | PartSplit:
    """The split stage: ``count`` usable rows (``times``: theirs, in row order, with
    ``--time``; ``groups``: their group codes with ``--group``) into the parts the solver
    holds out."""
    if groups is not None:
        train, held = split_groups(groups, holdout, seed)
        return HoldoutSplit(train, held, False, groups)
    if in_memory:
        train, held = split_holdout(count, holdout, seed, most_recent=times is not None)
        return HoldoutSplit(train, held, times is not None)
    fractions = part_fractions(count, holdout)
    cuts = time_cuts(times, *fractions) if times is not None else None
    return PartSplit(fractions, cuts)
