"""Data sets the tuning bench and tests/test_tuning_speed.py share (all invented, seeded).

* :func:`plant` — four smooth process inputs and one quality figure, the shape of a lab's or
  a plant's quality records (the size the tuning-speed figures are taken at);
* :func:`competing` — a linear trend, a kink and a wave: no single kernel family owns it, so
  rbf, Matérn and laplacian kernels score close to one another and ``--kernel auto`` has a
  real race to run;
* :func:`fine_sine` — 15 periods of a sine on one input (the tuning tests' width-range case);
* :func:`smooth_and_wiggly` — several targets that want very different kernel widths
  (``tests/test_per_target.py``, ``bench/per_target_rmse.py``).
"""

from __future__ import annotations

import numpy as np


def plant(n: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """(n, 4) inputs and (n, 1) target: y = sin(2x₁) + x₂x₃ + ½x₄² + N(0, 0.3²)."""
    rng = np.random.default_rng(seed)
    x = rng.uniform(-2, 2, (n, 4))
    y = np.sin(2 * x[:, 0]) + x[:, 1] * x[:, 2] + 0.5 * x[:, 3] ** 2
    return x, (y + 0.3 * rng.standard_normal(n))[:, None]


def competing(n: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """(n, 4) inputs and (n, 1) target: y = 1.5x₁ + |x₂| + sin(2x₃) + 0 · x₄ + N(0, 0.3²)."""
    rng = np.random.default_rng(seed)
    x = rng.uniform(-2, 2, (n, 4))
    y = 1.5 * x[:, 0] + np.abs(x[:, 1]) + np.sin(2 * x[:, 2])
    return x, (y + 0.3 * rng.standard_normal(n))[:, None]


def fine_sine(n: int, seed: int = 1) -> tuple[np.ndarray, np.ndarray]:
    """(n, 1) input on [0, 1] and (n, 1) target sin(30πu) + N(0, 0.05²)."""
    rng = np.random.default_rng(seed)
    u = rng.uniform(0, 1, n)[:, None]
    return u, np.sin(2 * np.pi * 15 * u) + 0.05 * rng.standard_normal((n, 1))


def smooth_and_wiggly(n: int = 150, seed: int = 1):
    """Two noisy targets linear in the inputs (u, v) and one nearly noise-free fast sine of
    u: (n, 2) inputs, (n, 3) targets, feature and target names. The smooth ones want a wide
    kernel, the wiggly one a narrow kernel; one shared kernel, chosen on the mean of their
    normalized errors, is a compromise that the wiggly target pays for.

    y₁, y₂ = ½u + 0.3v + N(0, 0.5²) (independent noise), y₃ = sin(2.5u) + N(0, 0.05²),
    u, v uniform on [−3, 3].
    """
    rng = np.random.default_rng(seed)
    x = rng.uniform(-3, 3, (n, 2))
    smooth = [0.5 * x[:, 0] + 0.3 * x[:, 1] + 0.5 * rng.normal(size=n) for _ in range(2)]
    wiggly = np.sin(2.5 * x[:, 0]) + 0.05 * rng.normal(size=n)
    return (x, np.column_stack([*smooth, wiggly]), ["u", "v"],
            ["smooth_a", "smooth_b", "wiggly"])
