"""Training envelope: per-feature ranges and a k-nearest-neighbour novelty score.

A request can sit inside every per-feature range and still be far from every training row
(a corner of a correlated cloud, or a hole in the operating map). The novelty score catches
that: the distance from the standardized query to its k-th nearest training row, the outlier
score of Ramaswamy, Rastogi & Shim, "Efficient algorithms for mining outliers from large data
sets" (SIGMOD 2000), divided by a threshold τ calibrated on the training rows themselves (the
0.99 quantile of their leave-one-out k-th-neighbour distances). ``novelty > 1`` means the query
is farther from the data than 99 % of the training rows are from theirs.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from service.kernels import KernelBlocks

#: Names of the checks a row can be flagged by, in the order ``flagged_by`` lists them:
#: a feature outside its training range, the novelty score, Hotelling's T², the residual Q,
#: a prediction outside its target's training range, a text feature's category never seen
#: (added by :func:`service.categories.flag_new`).
CHECKS = ("range", "novelty", "t2", "q", "target_range", "category")
#: Neighbours counted (common practice: small k, here 5).
NOVELTY_K = 5
#: Calibration quantile of the training rows' own k-th-neighbour distances.
NOVELTY_QUANTILE = 0.99


#: Sample whose k-th value bounds the k-th value of a whole row (see :func:`kth_value`).
_SAMPLE = 128


def kth_value(v: np.ndarray, k: int, largest: bool = False) -> float:
    """The k-th smallest (``largest``: k-th largest) value of the 1-D array ``v``, k from 0.

    Exact, and about three times quicker than one partial sort of a few thousand values: the
    k-th smallest t of the first :data:`_SAMPLE` values bounds the answer from above (at
    least k + 1 values are ≤ t), so only the values ≤ t need the partial sort.
    """
    n = v.shape[0]
    if n <= 2 * _SAMPLE:
        at = n - 1 - k if largest else k
        return float(np.partition(v, at)[at])
    s = np.partition(v[:_SAMPLE], _SAMPLE - 1 - k if largest else k)
    t = s[_SAMPLE - 1 - k] if largest else s[k]
    cand = v[v >= t] if largest else v[v <= t]
    at = cand.shape[0] - 1 - k if largest else k
    return float(np.partition(cand, at)[at])


def kth_distances(u: np.ndarray, k: int, c: float, out: np.ndarray) -> np.ndarray:
    """Per row of u = −c‖q − x‖² (:class:`service.kernels.KernelBlocks`), the Euclidean
    distance to the k-th nearest column (k from 0), into ``out``; u is partially sorted in
    place. The k-th smallest distance is the k-th largest u: √max(−u/c, 0)."""
    scale = -1.0 / c
    if u.shape[0] == 1:
        out[0] = math.sqrt(max(kth_value(u[0], k, largest=True) * scale, 0.0))
        return out
    at = u.shape[1] - 1 - k
    u.partition(at, axis=1)
    np.multiply(u[:, at], scale, out=out)
    np.maximum(out, 0.0, out=out)
    return np.sqrt(out, out=out)


class NeighbourIndex:
    """Distances from query rows to their k-th nearest reference row, built once per model.

    The reference is prepared once as squared-distance kernel blocks
    (:class:`service.kernels.KernelBlocks`, ``"sqeuclidean"``): one matrix product per batch
    gives u = −‖q − r_j‖² (one GEMV for a single row, the service's common case), then a
    partial sort.
    """

    def __init__(self, reference: np.ndarray, k: int):
        reference = np.asarray(reference, dtype=np.float64)
        self.rows, self.d = reference.shape
        self.k = k
        self.blocks = KernelBlocks("sqeuclidean", reference)

    def distances(self, q: np.ndarray, skip_self: bool = False, block: int = 1024) -> np.ndarray:
        """Euclidean distance from each row of ``q`` (m, d) to its k-th nearest reference row.

        ``skip_self``: the queries are the reference rows themselves, so the zero distance to
        itself is not counted (leave-one-out).
        """
        kk = min(self.k + int(skip_self), self.rows) - 1
        m = q.shape[0]
        out = np.empty(m)
        u = np.empty((min(m, block), self.rows))
        for start in range(0, m, block):
            qb = q[start : start + block]
            ub = self.blocks.exponent(self.blocks.rows(qb), u[: qb.shape[0]])
            kth_distances(ub, kk, 1.0, out[start : start + block])
        return out


def rows_within(rows: np.ndarray, x: np.ndarray) -> np.ndarray | None:
    """Indices i_r with x[i_r] bit-for-bit equal to rows[r], distinct; None if any is missing.

    The trainer keeps training rows as the novelty reference, so the prediction's distances
    to the training rows already hold the reference's.
    """
    rows, x = np.asarray(rows), np.asarray(x)
    if rows.ndim != 2 or x.ndim != 2 or rows.shape[1] != x.shape[1] or rows.dtype != x.dtype:
        return None
    where: dict[bytes, list[int]] = {}
    for i, row in enumerate(np.ascontiguousarray(x)):
        where.setdefault(row.tobytes(), []).append(i)
    found = np.empty(rows.shape[0], dtype=np.intp)
    for r, row in enumerate(np.ascontiguousarray(rows)):
        free = where.get(row.tobytes())
        if not free:  # not a training row, or more copies than the training rows have
            return None
        found[r] = free.pop()
    return found


def check_ranges(x_raw: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Boolean (m, d) mask of cells outside their feature's training range [lo, hi]."""
    return (x_raw < lo) | (x_raw > hi)


@dataclass(frozen=True)
class DomainChecks:
    """The checks beyond ranges and novelty, for one batch (each None when the version
    stores none): T² and Q as ratios to their limits (:mod:`service.pca_domain`), and the
    model's unclipped predictions (m, t) against each target's training range."""

    t2: np.ndarray | None = None
    q: np.ndarray | None = None
    y: np.ndarray | None = None
    targets: list[str] | None = None
    y_lo: np.ndarray | None = None
    y_hi: np.ndarray | None = None


def _target_flags(y: np.ndarray, targets: list[str], lo: np.ndarray, hi: np.ndarray
                  ) -> list[dict]:
    """Per row, the targets whose prediction lies outside their training range."""
    outside = (y < lo) | (y > hi)
    if not outside.any():  # the common case: one call, no per-row work
        return [{} for _ in range(y.shape[0])]
    rows = outside.any(axis=1).tolist()
    return [{targets[j]: {"value": float(y[i, j]), "min": float(lo[j]), "max": float(hi[j])}
             for j in np.flatnonzero(outside[i])} if rows[i] else {}
            for i in range(y.shape[0])]


def describe(
    x_raw: np.ndarray,
    outside: np.ndarray,
    novelty: np.ndarray,
    features: list[str],
    lo: np.ndarray,
    hi: np.ndarray,
    more: DomainChecks | None = None,
) -> list[dict]:
    """Per-row envelope dicts in the response's shape; ``flagged_by`` names every check
    that flagged the row (:data:`CHECKS` order), and ``inside`` is true when none did."""
    more = more or DomainChecks()
    t2 = None if more.t2 is None else more.t2.tolist()
    q = None if more.q is None else more.q.tolist()
    targets = (None if more.y is None else
               _target_flags(more.y, more.targets, more.y_lo, more.y_hi))
    result = []
    any_outside = outside.any(axis=1).tolist()
    for i, score in enumerate(novelty.tolist()):
        cols = np.flatnonzero(outside[i]) if any_outside[i] else ()
        novel = score > 1.0
        flagged = [name for name, hit in (("range", any_outside[i]), ("novelty", novel),
                                          ("t2", t2 is not None and t2[i] > 1.0),
                                          ("q", q is not None and q[i] > 1.0),
                                          ("target_range", bool(targets and targets[i])))
                   if hit]
        env = {
            "inside": not flagged,
            "out_of_range": {
                features[j]: {
                    "value": float(x_raw[i, j]),
                    "min": float(lo[j]),
                    "max": float(hi[j]),
                }
                for j in cols
            },
            "novelty": round(score, 4),
            "novel": bool(novel),
        }
        if t2 is not None:
            env["t2"] = round(t2[i], 4)
        if q is not None:
            env["q"] = round(q[i], 4)
        if targets is not None:
            env["target_out_of_range"] = targets[i]
        env["flagged_by"] = flagged
        result.append(env)
    return result
