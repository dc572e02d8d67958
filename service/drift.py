"""Input drift: has the distribution of new rows moved away from the training rows?

The kernel two-sample test of Gretton, Borgwardt, Rasch, Schölkopf & Smola, "A Kernel
Two-Sample Test", JMLR 13 (2012): the squared maximum mean discrepancy

    MMD² = E k(x, x') + E k(y, y') − 2 E k(x, y)

between the training rows x and the new rows y, both standardized with the version's own
scaler, estimated by the unbiased U-statistic (their eq. 3) and judged by a permutation
p-value p = (1 + #{permuted ≥ observed}) / (1 + B).

Which kernel: the version's own when it is characteristic (rbf, laplacian, Matérn), so
that MMD² = 0 only for equal distributions; for linear, polynomial and sigmoid, an rbf
kernel with the median heuristic bandwidth (Gretton et al. 2012, section 8) instead.

Sizes: each side is a seeded uniform subsample of at most :data:`MAX_ROWS` rows (the
quadratic estimator on the full joint kernel matrix, never the linear-time one). The training
side is the version's novelty reference, itself all training rows or a uniform random
:data:`MAX_ROWS` of them (``trainer/envelope_stats.py``).

Numpy only, and one call on a window of raw rows (:func:`check_drift`), so that the service
can run it in the background as well as ``kridge drift`` offline.
"""

from __future__ import annotations

from collections.abc import Callable
from contextlib import AbstractContextManager, nullcontext
from dataclasses import dataclass, field

import numpy as np

from service.kernels import KernelSpec, kernel_matrix, squared_distances

#: Rows kept per side (seeded uniform subsample above it).
MAX_ROWS = 2000
#: Permutations of the pooled rows behind the p-value (default).
PERMUTATIONS = 500
#: Pooled rows the median heuristic looks at (seeded subsample above it).
MEDIAN_ROWS = 1000
#: Permutations evaluated per matrix product (bounds the (N, chunk) buffer).
_PERM_CHUNK = 100

_CHARACTERISTIC = ("rbf", "laplacian", "matern32", "matern52")


def median_gamma(rows: np.ndarray) -> float:
    """γ = 1 / (2 σ²), σ the median pairwise Euclidean distance of ``rows`` (≥ 2 rows).

    The median heuristic (Gretton et al. 2012, section 8; common practice). Falls back to
    γ = 1/d when at least half the pairs coincide (σ = 0).
    """
    d2 = squared_distances(rows, rows)
    sigma = float(np.median(np.sqrt(d2[np.triu_indices(rows.shape[0], k=1)])))
    return 1.0 / (2.0 * sigma * sigma) if sigma > 0 else 1.0 / rows.shape[1]


def drift_kernel(spec: KernelSpec, pooled: np.ndarray, rng: np.random.Generator) -> KernelSpec:
    """The version's kernel when characteristic, else rbf with the median heuristic γ."""
    if spec.name in _CHARACTERISTIC:
        return spec
    pick = pooled
    if pooled.shape[0] > MEDIAN_ROWS:
        pick = pooled[rng.choice(pooled.shape[0], MEDIAN_ROWS, replace=False)]
    return KernelSpec("rbf", gamma=median_gamma(pick))


def mmd2_unbiased(kxx: np.ndarray, kyy: np.ndarray, kxy: np.ndarray) -> float:
    """Unbiased MMD²_u (Gretton et al. 2012, eq. 3) from the three kernel blocks.

    MMD²_u = Σ_{i≠j} k(xᵢ,xⱼ) / (n(n−1)) + Σ_{i≠j} k(yᵢ,yⱼ) / (m(m−1)) − 2 Σ k(xᵢ,yⱼ) / (nm).
    """
    n, m = kxx.shape[0], kyy.shape[0]
    sxx = kxx.sum() - np.trace(kxx)
    syy = kyy.sum() - np.trace(kyy)
    return float(sxx / (n * (n - 1)) + syy / (m * (m - 1)) - 2.0 * kxy.sum() / (n * m))


def mmd2_biased(kxx: np.ndarray, kyy: np.ndarray, kxy: np.ndarray) -> float:
    """Biased MMD²_b, the V-statistic (Gretton et al. 2012, eq. 5): means over all pairs."""
    return float(kxx.mean() + kyy.mean() - 2.0 * kxy.mean())


def _split_sums(k0: np.ndarray, rows: np.ndarray, total: float, member: np.ndarray):
    """Off-diagonal block sums (Sxx, Syy, Sxy) for each column of the 0/1 ``member`` matrix.

    With K₀ the joint kernel matrix with zero diagonal and a a column of ``member``:
    Sxx = aᵀK₀a, Sxy = aᵀ(K₀1) − Sxx, Syy = 1ᵀK₀1 − Sxx − 2Sxy.
    """
    sxx = np.einsum("ij,ij->j", member, k0 @ member)
    sxy = rows @ member - sxx
    return sxx, total - sxx - 2.0 * sxy, sxy


def permutation_test(k: np.ndarray, n: int, permutations: int, rng: np.random.Generator,
                     chunk: int = _PERM_CHUNK,
                     step: Callable[[], AbstractContextManager] = nullcontext
                     ) -> tuple[float, float]:
    """MMD²_u of the first ``n`` rows against the rest of the joint kernel matrix ``k``, and
    its permutation p-value (1 + #{permuted ≥ observed}) / (1 + B).

    The diagonal of ``k`` is set to zero in place (the U-statistic leaves it out; no copy of
    an (N, N) matrix).

    Under no drift the rows are exchangeable, so p ≤ α has probability at most α for any
    sample size (a Monte Carlo permutation test; Gretton et al. 2012, section 5).

    ``chunk`` permutations are evaluated per matrix product, each set inside ``step()`` (the
    service passes its compute slot, so a request waits for one set at most); neither
    changes the result.
    """
    big = k.shape[0]
    m = big - n
    with step():
        np.fill_diagonal(k, 0.0)
        rows = k.sum(axis=1)
    total = float(rows.sum())

    def stats(member: np.ndarray) -> np.ndarray:
        sxx, syy, sxy = _split_sums(k, rows, total, member)
        return sxx / (n * (n - 1)) + syy / (m * (m - 1)) - 2.0 * sxy / (n * m)

    first = np.zeros((big, 1))
    first[:n] = 1.0
    with step():
        observed = float(stats(first)[0])
    above = 0
    for start in range(0, permutations, chunk):
        b = min(chunk, permutations - start)
        member = np.zeros((big, b))
        for j in range(b):
            member[rng.permutation(big)[:n], j] = 1.0
        # kernel values lie in [0, 1]: 1e-12 absorbs rounding, so a permutation equal to the
        # observed split in exact arithmetic counts as ≥
        with step():
            above += int(np.sum(stats(member) >= observed - 1e-12))
    return observed, (1.0 + above) / (1.0 + permutations)


def mmd_test(spec: KernelSpec, ref: np.ndarray, new: np.ndarray, permutations: int,
             rng: np.random.Generator, chunk: int = _PERM_CHUNK,
             step: Callable[[], AbstractContextManager] = nullcontext
             ) -> tuple[KernelSpec, float, float]:
    """Kernel two-sample test of standardized rows ``ref`` (n, d) against ``new`` (m, d).

    Returns (kernel used, MMD²_u, permutation p-value); the kernel is ``spec`` when it is
    characteristic, else rbf with the median heuristic γ of the pooled rows. ``chunk`` and
    ``step`` as in :func:`permutation_test` (the kernel matrix is built inside one step).
    """
    pooled = np.vstack([ref, new])
    with step():
        used = drift_kernel(spec, pooled, rng)
        k = kernel_matrix(used, pooled)
    statistic, p = permutation_test(k, ref.shape[0], permutations, rng, chunk, step)
    return used, statistic, p


@dataclass
class DriftResult:
    """One drift check. ``statistic`` is MMD²_u; ``features`` one dict per feature."""

    statistic: float
    p_value: float
    kernel: str
    kernel_source: str
    reference_rows: int
    new_rows: int
    new_rows_used: int
    permutations: int
    seed: int
    features: list[dict] = field(default_factory=list)

    def as_dict(self) -> dict:
        """Plain JSON-ready form (``kridge drift --json``)."""
        return {
            "statistic": self.statistic, "p_value": self.p_value, "kernel": self.kernel,
            "kernel_source": self.kernel_source, "estimator": ESTIMATOR,
            "sizes": {"reference_rows": self.reference_rows, "new_rows": self.new_rows,
                      "new_rows_used": self.new_rows_used, "max_rows_per_side": MAX_ROWS},
            "permutations": self.permutations, "seed": self.seed,
            "feature_method": FEATURE_METHOD, "features": self.features,
        }


ESTIMATOR = ("unbiased MMD² U-statistic (Gretton et al. 2012, eq. 3); permutation p-value "
             "(1 + #{permuted ≥ observed}) / (1 + permutations)")
FEATURE_METHOD = ("mean_shift = (new mean − training mean) / training scale; outside_range = "
                  "share of new rows outside the training min–max; mmd_drop = MMD²_u minus "
                  "MMD²_u with that feature left out (same kernel): the larger, the more the "
                  "feature drives the discrepancy")


def _subsample(rows: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    if rows.shape[0] <= MAX_ROWS:
        return rows
    return rows[np.sort(rng.choice(rows.shape[0], MAX_ROWS, replace=False))]


def feature_table(model, raw: np.ndarray, spec: KernelSpec, ref: np.ndarray, new: np.ndarray,
                  statistic: float) -> list[dict]:
    """Per-feature summaries (:data:`FEATURE_METHOD`) of all new raw rows ``raw``; the MMD
    drops from the standardized (subsampled) ``ref`` and ``new`` the statistic used."""
    names = model.features
    # the manifest's mean and scale are the training mean and scale
    shift = (raw.mean(axis=0) - model.mean) / model.scale
    outside = ((raw < model.lo) | (raw > model.hi)).mean(axis=0)
    n = ref.shape[0]
    drops = np.zeros(len(names))
    if len(names) > 1:
        for j in range(len(names)):
            keep = [i for i in range(len(names)) if i != j]
            k = kernel_matrix(spec, np.vstack([ref[:, keep], new[:, keep]]))
            drops[j] = statistic - mmd2_unbiased(k[:n, :n], k[n:, n:], k[:n, n:])
    else:
        drops[:] = statistic
    return [{"feature": name, "mean_shift": float(shift[j]), "outside_range": float(outside[j]),
             "mmd_drop": float(drops[j])} for j, name in enumerate(names)]


def check_drift(model, raw: np.ndarray, permutations: int = PERMUTATIONS,
                seed: int = 0) -> DriftResult:
    """Drift of the raw rows ``raw`` (m, d), in ``model.features`` order, against ``model``.

    ``model`` is a loaded version (:func:`service.load_model`): its scaler, kernel, ranges and
    reference rows are used. Needs at least 2 finite rows and ``permutations`` ≥ 1 (checked
    by the caller at the boundary).
    """
    rng = np.random.default_rng(seed)
    ref = _subsample(np.asarray(model.reference, dtype=np.float64), rng)
    picked = _subsample(raw, rng)
    new = model.standardize(picked)
    spec, statistic, p = mmd_test(model.spec, ref, new, permutations, rng)
    own = ("the version's own kernel" if len({tk.spec for tk in model.target_kernels}) == 1
           else f"the version's first target's kernel ({model.targets[0]})")
    source = (own if spec is model.spec else
              f"rbf with the median heuristic bandwidth ({model.spec.name} is not characteristic)")
    table = feature_table(model, raw, spec, ref, new, statistic)
    return DriftResult(statistic, p, spec.describe(), source, int(ref.shape[0]),
                       int(raw.shape[0]), int(picked.shape[0]), permutations, seed, table)
