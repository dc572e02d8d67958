"""Shape of a row: Hotelling's T² and the residual Q (SPE) of a PCA of the training rows.

Per-feature ranges and the nearest-neighbour novelty look at each row's values and at its
distance to the data. A spectrum sent reversed, or a straight ramp across 100 correlated
columns, can pass both: every value is plausible and the row is not far in Euclidean terms.
What changes is the row's *shape*. A principal component model of the standardized training
rows sees it:

* T² = Σ_a t_a² / λ_a, with scores t = (s(x) − μ)·P over the k kept components
  (loadings P, d × k, and their variances λ): how unusual the row is *within* the plane
  the training rows span (Hotelling 1931; Jackson, "A user's guide to principal components",
  Wiley 1991).
* Q = ‖z − t Pᵀ‖² = ‖z‖² − ‖t‖², z = s(x) − μ (P has orthonormal columns): the squared
  distance *off* that plane, the squared prediction error (Jackson & Mudholkar,
  Technometrics 1979).

The trainer fits the components and their control limits (:mod:`trainer.pca_limits`); both
are reported here as ratios to their limits, like the novelty score: above 1 flags the row.
The cost per batch is one (m, d) × (d, k) product and two row sums.
"""

from __future__ import annotations

import math

import numpy as np


class PcaDomain:
    """T² and Q of raw rows against a stored principal component model.

    Parameters
    ----------
    loadings : (d, k) orthonormal columns P, in standardized feature space.
    center : (d,) mean μ of the standardized rows the components were fitted on.
    variances : (k,) variance λ_a of each kept score (ddof = 1).
    t2_limit, q_limit : control limits; a row whose statistic exceeds its limit is flagged.
        ``q_limit`` is None when no variance was left off the plane (no Q check).
    mean, scale : the model's standardization s(x) = (x − mean) / scale, folded in here so
        that raw rows need one pass: z = (x − (mean + μ·scale)) / scale.
    """

    def __init__(self, loadings: np.ndarray, center: np.ndarray, variances: np.ndarray,
                 t2_limit: float, q_limit: float | None, mean: np.ndarray,
                 scale: np.ndarray):
        p = np.ascontiguousarray(loadings, dtype=np.float64)
        if p.ndim != 2 or p.shape[0] != mean.shape[0] or variances.shape != (p.shape[1],):
            raise ValueError(f"PCA loadings {p.shape}, variances {variances.shape} and "
                             f"{mean.shape[0]} features disagree")
        self.k = p.shape[1]
        # T² = ‖t / √λ‖²: the scaling is folded into a second copy of the loadings
        self.loadings = p
        self.whitened = np.ascontiguousarray(p / np.sqrt(variances)[None, :])
        self.offset = mean + np.asarray(center, dtype=np.float64) * scale
        self.inv_scale = 1.0 / scale
        self.t2_limit = float(t2_limit)
        self.q_limit = None if q_limit is None else float(q_limit)
        # one product gives the whitened scores and, for Q, the plain scores too; a second,
        # small one sums their squares, already divided by the limits: [T²/limit, ‖t‖²/limit]
        k = self.k
        if self.q_limit is None:
            self.operand = self.whitened
            self.summer = np.full((k, 1), 1.0 / self.t2_limit)
        else:
            self.operand = np.ascontiguousarray(np.hstack([self.whitened, p]))
            self.summer = np.zeros((2 * k, 2))
            self.summer[:k, 0] = 1.0 / self.t2_limit
            self.summer[k:, 1] = 1.0 / self.q_limit

    def statistics(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray | None]:
        """(T², Q) of raw rows ``x`` (m, d); Q is None without a Q limit."""
        t2, q = self.ratios(x)
        return t2 * self.t2_limit, None if q is None else q * self.q_limit

    def ratios(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray | None]:
        """(T² / T²-limit, Q / Q-limit) of raw rows ``x`` (m, d): above 1 flags the row.
        Q is None without a Q limit."""
        z = x - self.offset
        z *= self.inv_scale
        both = z @ self.operand
        both *= both
        sums = both @ self.summer
        t2 = sums[:, 0]
        if self.q_limit is None:
            return _finite(t2), None
        z *= z
        q = z.sum(axis=1)
        q *= 1.0 / self.q_limit
        q -= sums[:, 1]  # Q = ‖z‖² − ‖t‖², each over the limit
        np.maximum(q, 0.0, out=q)
        if not math.isfinite(t2.sum() + q.sum()):
            return _finite(t2), _finite(q)
        return t2, q


def _finite(v: np.ndarray) -> np.ndarray:
    """A row so far out that its statistic overflowed (inputs near ±1e12 on a feature of
    tiny spread) is as flagged as a row can be: the largest float, never NaN or ∞, which
    JSON cannot carry."""
    return np.nan_to_num(v, nan=_LARGEST, posinf=_LARGEST)


_LARGEST = float(np.finfo(np.float64).max)


def from_bundle(manifest_part: dict | None, arrays: dict[str, np.ndarray], mean: np.ndarray,
                scale: np.ndarray) -> PcaDomain | None:
    """The bundle's PCA model, or None when the version stores none (older bundles). A
    manifest that names the check without its arrays is incomplete (KeyError, which the
    loader reports as such)."""
    if not manifest_part:
        return None
    for key in ("pca_loadings", "pca_center"):
        if key not in arrays:
            raise KeyError(key)
    return PcaDomain(arrays["pca_loadings"], arrays["pca_center"],
                     np.asarray(manifest_part["variances"], dtype=np.float64),
                     manifest_part["t2_limit"], manifest_part.get("q_limit"), mean, scale)
