"""The principal component model of the training rows and its T² and Q control limits.

Fitted once at training on the standardized rows the envelope is drawn from (every training
row for the exact solver; the training rows of the uniform sample for Nyström), stored as
two bundle arrays (``pca_loadings``, ``pca_center``) and the manifest's
``envelope.pca`` (variances, limits, the rule that chose k). The service computes the
statistics (:mod:`service.pca_domain`).

Rules
-----
* Components kept: the smallest k whose cumulative share of the variance is at least
  :data:`VARIANCE_SHARE` (0.95, common practice), capped at k ≤ max(1, ⌊n / 10⌋) so that
  n − k ≥ 0.9·n rows back the limits, and at k ≤ d − 1 so that some variance is left for Q.
* T² limit for a new row, at level 1 − a = :data:`LEVEL`:
  k(n − 1)(n + 1) / (n(n − k)) · F₁₋ₐ(k, n − k) (Tracy, Young & Mason, J. Quality Technology
  1992; Jackson 1991, eq. 1.7.5, cited from memory).
* Q limit: Jackson & Mudholkar (Technometrics 1979) from θᵢ = Σ_{j>k} λⱼⁱ (i = 1, 2, 3) of the
  discarded eigenvalues, h₀ = 1 − 2θ₁θ₃ / (3θ₂²):
  Q = θ₁ [c·√(2θ₂h₀²)/θ₁ + 1 + θ₂h₀(h₀ − 1)/θ₁²]^(1/h₀), c the standard normal 1 − a
  quantile (as used for batch monitoring by Nomikos & MacGregor, Technometrics 1995). When
  h₀ ≤ 0 (a few large discarded eigenvalues beside many small ones) the formula does not
  apply and the moment-matched g·χ²_h (g = θ₂/θ₁, h = θ₁²/θ₂; Box, Ann. Math. Statist. 1954)
  is used instead; the manifest names which.

Both limits assume roughly normal scores: on skewed or clustered data the false-alarm rate
differs from a; the manifest stores the share of training rows each limit flags.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import stats

from service.envelope import NOVELTY_QUANTILE

#: Cumulative share of variance the kept components explain at least.
VARIANCE_SHARE = 0.95
#: Level of both control limits: the novelty threshold's quantile, so that each check
#: flags about 1 % of rows drawn like the training rows.
LEVEL = NOVELTY_QUANTILE
#: Fewest rows (and features) for a PCA check; below, the envelope has none.
MIN_ROWS = 10


def components_kept(eigenvalues: np.ndarray, n: int) -> int:
    """k by the module's rule, from eigenvalues sorted in decreasing order."""
    d = eigenvalues.shape[0]
    total = float(eigenvalues.sum())
    share = np.cumsum(eigenvalues) / total
    k = int(np.searchsorted(share, VARIANCE_SHARE - 1e-12) + 1)
    positive = int(np.count_nonzero(eigenvalues > 1e-12 * eigenvalues[0]))
    return max(1, min(k, max(1, n // 10), d - 1, positive))


def t2_limit(k: int, n: int, level: float = LEVEL) -> float:
    """Tracy–Young–Mason limit of T² for a new row: k(n−1)(n+1)/(n(n−k))·F_level(k, n−k)."""
    return k * (n - 1) * (n + 1) / (n * (n - k)) * float(stats.f.ppf(level, k, n - k))


def q_limit(discarded: np.ndarray, level: float = LEVEL) -> tuple[float, str]:
    """(limit, formula name) of Q from the discarded eigenvalues (module notes)."""
    lam = np.asarray(discarded, dtype=np.float64)
    th1, th2, th3 = (float(np.sum(lam**i)) for i in (1, 2, 3))
    h0 = 1.0 - 2.0 * th1 * th3 / (3.0 * th2**2)
    if h0 > 0:
        c = float(stats.norm.ppf(level))
        inner = c * math.sqrt(2.0 * th2 * h0**2) / th1 + 1.0 + th2 * h0 * (h0 - 1.0) / th1**2
        return th1 * inner ** (1.0 / h0), "Jackson & Mudholkar (1979)"
    g, h = th2 / th1, th1**2 / th2
    return g * float(stats.chi2.ppf(level, h)), "g·chi2(h) moment match (Box 1954)"


def fit_pca_domain(x_s: np.ndarray, where: str) -> tuple[dict | None, dict[str, np.ndarray]]:
    """(the manifest's ``envelope.pca``, bundle arrays) from standardized rows ``x_s``;
    (None, {}) when there are too few rows or features for the check. ``where`` says which
    rows these are, for the manifest."""
    n, d = x_s.shape
    if n < MIN_ROWS or d < 2:
        return None, {}
    center = x_s.mean(axis=0)
    z = x_s - center
    cov = (z.T @ z) / (n - 1)  # ddof = 1, as the T² limit's derivation assumes
    eigenvalues, vectors = np.linalg.eigh(cov)
    order = np.argsort(eigenvalues)[::-1]
    eigenvalues = np.maximum(eigenvalues[order], 0.0)
    vectors = vectors[:, order]
    if eigenvalues[0] <= 0:
        return None, {}
    k = components_kept(eigenvalues, n)
    loadings = np.ascontiguousarray(vectors[:, :k])
    kept, discarded = eigenvalues[:k], eigenvalues[k:]
    t2_max = t2_limit(k, n)
    q_max, q_how = (None, None)
    if discarded.sum() > 1e-12 * eigenvalues.sum():
        q_max, q_how = q_limit(discarded)
    scores = z @ loadings
    t2 = np.einsum("ij,ij->i", scores / np.sqrt(kept), scores / np.sqrt(kept))
    part = {
        "method": "principal components of the standardized training rows: Hotelling's T² "
                  "in the kept components, Q (squared prediction error) off them",
        "rows": int(n),
        "rows_from": where,
        "components": int(k),
        "components_rule": f"smallest k with cumulative explained variance ≥ {VARIANCE_SHARE}, "
                           "at most max(1, ⌊n/10⌋) and d − 1",
        "explained_variance": float(kept.sum() / eigenvalues.sum()),
        "variances": kept.tolist(),
        "level": LEVEL,
        "t2_limit": t2_max,
        "t2_limit_formula": "k(n−1)(n+1)/(n(n−k))·F(level; k, n−k) "
                            "(Tracy, Young & Mason 1992)",
        "q_limit": q_max,
        "q_limit_formula": q_how,
        "score": "t2 = T²/t2_limit, q = Q/q_limit; a row is flagged when either exceeds 1",
        "training_rows_flagged": {"t2": float(np.mean(t2 > t2_max))},
    }
    if q_max is not None:
        q = np.einsum("ij,ij->i", z, z) - np.einsum("ij,ij->i", scores, scores)
        part["training_rows_flagged"]["q"] = float(np.mean(q > q_max))
    return part, {"pca_loadings": loadings, "pca_center": center}
