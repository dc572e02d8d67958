"""Where to look for the kernel width γ: a range that follows the data.

A kernel width only means something relative to the distances between rows. The search
range therefore runs from a kernel that is almost flat over the data to one that barely
reaches the next row: a series with fine structure has small neighbour distances, so its range
reaches far enough, where a fixed grid would not follow a rescaled or densely sampled input.
"""

from __future__ import annotations

import numpy as np

from service.kernels import KernelSpec, kernel_matrix, l1_distances, squared_distances

#: Rows sampled (against all rows) for the distance quantiles.
DISTANCE_SAMPLE = 1000


def width_range(name: str, x_s: np.ndarray, seed: int = 0) -> tuple[float, float]:
    """Data-driven (low, high) range for γ of kernel ``name`` on standardized rows.

    Distance kernels (k depends on γ·D, D the squared Euclidean or the L1 distance):
    low = 0.05 / q₉₀(D) and high = 3 / median nearest-neighbour D, from up to 1,000 sampled
    rows against all rows. Dot-product kernels (k depends on γ aᵀb): low = 0.01 / s,
    high = 3 / s with s the 90th percentile of |aᵀb|.
    """
    n = x_s.shape[0]
    rng = np.random.default_rng(seed)
    pick = rng.choice(n, size=min(n, DISTANCE_SAMPLE), replace=False)
    sub = x_s[pick]
    if name in ("polynomial", "sigmoid"):
        s = float(np.quantile(np.abs(kernel_matrix(KernelSpec("linear"), sub, x_s)), 0.9))
        s = s if s > 0 else 1.0
        return 0.01 / s, 3.0 / s
    d = (l1_distances if name == "laplacian" else squared_distances)(sub, x_s)
    d[np.arange(len(pick)), pick] = np.inf  # a row is not its own neighbour
    positive = np.where(d > 1e-12, d, np.inf)
    nn = np.min(positive, axis=1)
    nn = nn[np.isfinite(nn)]
    far = d[np.isfinite(d)]
    q90 = float(np.quantile(far, 0.9)) if far.size else 1.0
    nn_med = float(np.median(nn)) if nn.size else q90
    lo, hi = 0.05 / max(q90, 1e-300), 3.0 / max(nn_med, 1e-300)
    if not hi > lo * 10:  # degenerate data (few distinct rows): still search two decades+
        hi = lo * 1e3
    return lo, hi
