"""What a tuning candidate is scored on: the standardized rows and how they are split.

Three schemes, chosen by the data:

* exact leave-one-out (closed form, :mod:`trainer.exact.loo`) up to :data:`EXACT_MAX_ROWS` rows;
* above that, exact leave-one-out on all rows costs n³ per scored point and keeps growing:
  k-fold cross-validation on a random subsample of :data:`FALLBACK_ROWS` rows, whose cost
  per scored point (one factorization per fold) matches leave-one-out's at the limit, so
  the time of a search rises up to the limit and stays there (no step either way);
* rows in groups (``--group``): k-fold over whole groups (:func:`group_folds`), since
  leave-one-out would score a row with its own copies (a mix measured twice) in the fit;
* rows in time order (``--time``): forward-chaining folds (:func:`time_series_folds`), since
  leave-one-out is optimistic on an autocorrelated series (a row's neighbours in time are
  near-copies of it). Each such fold standardizes its features and centres its targets on
  its own training rows (:meth:`Problem.fold_scaling`), so nothing of the validation block
  or the rows after it reaches the fit that predicts it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from trainer.errors import UserError
from trainer.exact.fit import Standardizer

#: Above this many training rows, tuning uses k-fold CV on a subsample instead of exact LOO.
#: Past the coarse stage a search scores about 20 points on all rows, each one Cholesky
#: factorization and one triangular inverse of the n × n system; the limit bounds that
#: search's time (timings in DEVELOPERS.md, "Measured limits"; ``bench/tuning_bench.py``
#: measures them).
EXACT_MAX_ROWS = 4000
#: Fallback: subsample size and number of folds. A point costs FALLBACK_FOLDS factorizations
#: of (1 − 1/FALLBACK_FOLDS)·FALLBACK_ROWS rows: 5 · (0.8 · 3,700)³ / 3 ≈ 2 · 4,000³ / 3
#: multiply-adds, those of the factorization and inverse of leave-one-out at EXACT_MAX_ROWS.
FALLBACK_ROWS = 3700
FALLBACK_FOLDS = 5
#: With ``--time``, above EXACT_MAX_ROWS the time folds run on this many rows, evenly spaced.
TIME_FALLBACK_ROWS = 2400
#: Blocked cross-validation in time order (``--time``): forward-chaining folds as in
#: scikit-learn's ``TimeSeriesSplit``, with a gap of this fraction of a fold between the end
#: of the training rows and the validation block, so that rows right before a validation
#: block (near-copies of it in an autocorrelated series) do not leak into its fit.
TIME_FOLDS = 5
TIME_GAP_FRACTION = 0.2
#: Ridge grid, relative to the mean diagonal of K.
RIDGE_RELATIVE = (1e-7, 1e3)
RIDGE_GRID_SIZE = 30


@dataclass
class Problem:
    """Everything the evaluation of one candidate needs."""

    x_s: np.ndarray  # standardized training rows (or the subsample in the fallback)
    y_c: np.ndarray  # centered targets
    inv_var: np.ndarray  # (t,) 1 / Var(y_t)
    ridge_fixed: float | None
    folds: list[tuple[np.ndarray, np.ndarray]] | None = None  # k-fold: (train, validation)
    #: time folds: the raw rows, so that each fold standardizes on its own training rows
    raw: tuple[np.ndarray, np.ndarray] | None = None
    grouped: bool = False  # folds keep groups whole: no leave-one-out stage may run
    evaluated: int = 0  # eigendecompositions run
    factorizations: int = 0  # Cholesky factorizations run (trainer.exact.cholesky_score)
    seconds: float = 0.0
    extra: dict = field(default_factory=dict)

    def ridge_grid(self, k_diag_mean: float) -> np.ndarray:
        if self.ridge_fixed is not None:
            return np.array([self.ridge_fixed])
        scale = k_diag_mean if k_diag_mean > 0 and math.isfinite(k_diag_mean) else 1.0
        lo, hi = RIDGE_RELATIVE
        return scale * np.geomspace(lo, hi, RIDGE_GRID_SIZE)

    @property
    def decompositions(self) -> int:
        """Eigendecompositions one candidate costs: one for LOO, one per fold."""
        return 1 if self.folds is None else len(self.folds)

    def fold_scaling(self, i: int) -> FoldScaling:
        """Fold ``i``'s standardization and target means, from its training rows only."""
        x, y = self.raw
        train = self.folds[i][0]
        return FoldScaling(Standardizer.fit(x[train]), y[train].mean(axis=0))

    def fold_rows(self, i: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """(x_train, x_valid, y_train, y_valid) of time fold ``i``, standardized and centred
        by :meth:`fold_scaling`."""
        x, y = self.raw
        train, valid = self.folds[i]
        own = self.fold_scaling(i)
        return (own.scaler(x[train]), own.scaler(x[valid]), y[train] - own.y_mean,
                y[valid] - own.y_mean)


@dataclass(frozen=True)
class FoldScaling:
    """What a fold learns from its training rows before any kernel: scaler and target means."""

    scaler: Standardizer
    y_mean: np.ndarray


def time_series_folds(n: int, n_splits: int = TIME_FOLDS,
                      gap: int | None = None) -> list[tuple[np.ndarray, np.ndarray]]:
    """Forward-chaining folds over rows in time order: (training rows, validation block).

    Validation blocks are the last ``n_splits`` contiguous blocks of ⌊n / (n_splits + 1)⌋ rows;
    each is fitted on every row before it except the ``gap`` rows right before it. This is
    the split of scikit-learn's ``TimeSeriesSplit(n_splits, gap=gap)``; ``gap`` defaults to
    :data:`TIME_GAP_FRACTION` of a block.
    """
    size = n // (n_splits + 1)
    if size < 1:
        raise UserError(f"{n} rows are too few for {n_splits} time-ordered folds")
    gap = int(round(TIME_GAP_FRACTION * size)) if gap is None else gap
    rows = np.arange(n)
    out = []
    for start in range(n - n_splits * size, n, size):
        train = rows[: max(start - gap, 0)]
        if train.size < 2:
            raise UserError(f"{n} rows are too few for {n_splits} time-ordered folds with a gap "
                            f"of {gap} rows")
        out.append((train, rows[start:start + size]))
    return out


def group_folds(groups: np.ndarray, n_splits: int = FALLBACK_FOLDS
                ) -> list[tuple[np.ndarray, np.ndarray]]:
    """k folds over whole groups: (training rows, validation rows), every group in exactly
    one validation fold, k = min(``n_splits``, groups).

    Groups go, largest first, to the fold with the fewest rows so far (the balancing of
    scikit-learn's ``GroupKFold``), so fold sizes stay close even when groups are unequal.
    """
    labels, codes, sizes = np.unique(groups, return_inverse=True, return_counts=True)
    k = min(n_splits, labels.size)
    if k < 2:
        raise UserError(f"{labels.size} group(s) in the training part are too few for grouped "
                        "folds; give --gamma and --ridge, or more groups")
    fold_of_group = np.empty(labels.size, dtype=np.int64)
    load = np.zeros(k, dtype=np.int64)
    for g in np.argsort(-sizes, kind="stable"):
        f = int(np.argmin(load))
        fold_of_group[g] = f
        load[f] += sizes[g]
    fold = fold_of_group[codes]
    rows = np.arange(groups.size)
    return [(rows[fold != f], rows[fold == f]) for f in range(k)]


def standardized_problem(x_tr: np.ndarray, y_tr: np.ndarray, ridge_fixed: float | None,
                         seed: int, time_ordered: bool = False,
                         groups: np.ndarray | None = None) -> tuple[Problem, dict]:
    """The problem tuning scores candidates on, and a JSON-ready account of the scheme
    (``fallback``: False or why a subsample was used; ``time_folds`` in time order)."""
    n = x_tr.shape[0]
    x_s = Standardizer.fit(x_tr)(x_tr)
    y_c = y_tr - y_tr.mean(axis=0)
    var = y_c.var(axis=0)
    var[var <= 0] = 1.0
    info: dict = {"fallback": False}
    folds = raw = None
    if groups is not None:
        return _grouped_problem(x_s, y_c, 1.0 / var, ridge_fixed, seed, groups, info)
    if time_ordered:
        raw = (x_tr, y_tr)
        if n > EXACT_MAX_ROWS:  # every k-th row keeps the time order and the whole span
            keep = np.unique(np.linspace(0, n - 1, TIME_FALLBACK_ROWS).round().astype(int))
            x_s, y_c = x_s[keep], y_c[keep] - y_c[keep].mean(axis=0)
            raw = (x_tr[keep], y_tr[keep])
            info["fallback"] = {
                "reason": f"{n} training rows > {EXACT_MAX_ROWS}: folds on every "
                          f"{n / keep.size:.1f}-th row in time order",
                "subsample_rows": int(keep.size), "folds": TIME_FOLDS,
            }
        folds = time_series_folds(x_s.shape[0])
        info["time_folds"] = {
            "folds": len(folds), "validation_rows": int(len(folds[0][1])),
            "gap_rows": int(folds[0][1][0] - folds[0][0][-1] - 1),
            "how": "forward-chaining contiguous blocks in time order (TimeSeriesSplit with "
                   "gap); each fold standardized and centred on its own training rows",
        }
    elif n > EXACT_MAX_ROWS:
        rng = np.random.default_rng(seed)
        keep = np.sort(rng.choice(n, size=FALLBACK_ROWS, replace=False))
        x_s, y_c = x_s[keep], y_c[keep] - y_c[keep].mean(axis=0)
        perm = rng.permutation(FALLBACK_ROWS)
        everything = np.arange(FALLBACK_ROWS)
        folds = [(np.setdiff1d(everything, f), np.sort(f))
                 for f in np.array_split(perm, FALLBACK_FOLDS)]
        info["fallback"] = {
            "reason": f"{n} training rows > {EXACT_MAX_ROWS}: exact LOO (n³ per candidate) "
                      "too slow",
            "subsample_rows": FALLBACK_ROWS,
            "folds": FALLBACK_FOLDS,
        }
    return Problem(x_s, y_c, 1.0 / var, ridge_fixed, folds, raw), info


def _grouped_problem(x_s, y_c, inv_var, ridge_fixed, seed: int, groups: np.ndarray,
                     info: dict) -> tuple[Problem, dict]:
    """Grouped folds on the tuning rows (above :data:`EXACT_MAX_ROWS`, on a seeded random
    :data:`FALLBACK_ROWS` of them, as the k-fold fallback)."""
    n = x_s.shape[0]
    if n > EXACT_MAX_ROWS:
        keep = np.sort(np.random.default_rng(seed).choice(n, size=FALLBACK_ROWS, replace=False))
        x_s, y_c, groups = x_s[keep], y_c[keep] - y_c[keep].mean(axis=0), groups[keep]
        info["fallback"] = {"reason": f"{n} training rows > {EXACT_MAX_ROWS}: grouped folds "
                                      f"on a {FALLBACK_ROWS}-row subsample",
                            "subsample_rows": FALLBACK_ROWS, "folds": FALLBACK_FOLDS}
    folds = group_folds(groups)
    info["group_folds"] = {
        "folds": len(folds), "groups": int(np.unique(groups).size),
        "validation_rows": [int(v.size) for _, v in folds],
        "how": "k-fold over whole groups, largest groups first into the fold with the "
               "fewest rows (GroupKFold's balancing)"}
    return Problem(x_s, y_c, inv_var, ridge_fixed, folds, grouped=True), info


def error_method(info: dict) -> str:
    """The short name of the validation scheme, carried by every error it produced."""
    if "group_folds" in info:
        return "group-fold"
    if "time_folds" in info:
        return "time-fold"
    return "k-fold" if info["fallback"] else "LOO"


def scheme_text(info: dict) -> str:
    """The validation scheme in words, for the log and the manifest."""
    if "group_folds" in info:
        gf = info["group_folds"]
        return (f"{gf['folds']}-fold cross-validation over whole groups ({gf['groups']} "
                "groups)" + (f" on a {info['fallback']['subsample_rows']}-row subsample"
                             if info["fallback"] else ""))
    if "time_folds" in info:
        tf = info["time_folds"]
        return (f"blocked cross-validation in time order ({tf['folds']} forward-chaining folds "
                f"of {tf['validation_rows']} rows, gap {tf['gap_rows']} rows)")
    if info["fallback"]:
        fb = info["fallback"]
        return f"{fb['folds']}-fold cross-validation on a {fb['subsample_rows']}-row subsample"
    return "exact leave-one-out"
