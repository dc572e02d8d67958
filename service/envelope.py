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

import numpy as np

from service.kernels import row_sq_norms

#: Neighbours counted (common practice: small k, here 5).
NOVELTY_K = 5
#: Calibration quantile of the training rows' own k-th-neighbour distances.
NOVELTY_QUANTILE = 0.99


def kth_neighbour_distance(
    reference: np.ndarray, ref_sq: np.ndarray, q: np.ndarray, k: int, skip_self: bool = False
) -> np.ndarray:
    """Euclidean distance from each row of ``q`` to its k-th nearest row of ``reference``.

    Parameters
    ----------
    reference : (r, d) standardized reference rows; ``ref_sq`` their squared norms.
    q : (m, d) standardized query rows.
    k : which neighbour (1 = nearest).
    skip_self : the queries are reference rows themselves; do not count the zero distance.

    Returns
    -------
    (m,) distances, computed as √max(‖q‖² − 2qᵀr + ‖r‖², 0).
    """
    kk = min(k + int(skip_self), reference.shape[0]) - 1
    out = np.empty(q.shape[0])
    for start in range(0, q.shape[0], 1024):
        block = q[start : start + 1024]
        d2 = block @ reference.T
        d2 *= -2.0
        d2 += row_sq_norms(block)[:, None]
        d2 += ref_sq[None, :]
        out[start : start + 1024] = np.partition(d2, kk, axis=1)[:, kk]
    return np.sqrt(np.maximum(out, 0.0))


def check_ranges(x_raw: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Boolean (m, d) mask of cells outside their feature's training range [lo, hi]."""
    return (x_raw < lo) | (x_raw > hi)


def describe(
    x_raw: np.ndarray,
    outside: np.ndarray,
    novelty: np.ndarray,
    features: list[str],
    lo: np.ndarray,
    hi: np.ndarray,
) -> list[dict]:
    """Per-row envelope dicts in the response's shape."""
    result = []
    for i in range(x_raw.shape[0]):
        cols = np.flatnonzero(outside[i])
        score = float(novelty[i])
        novel = score > 1.0
        result.append(
            {
                "inside": not (cols.size or novel),
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
        )
    return result
