"""Data sets the tuning bench and tests/test_tuning_speed.py share (all invented, seeded).

* :func:`plant` — four smooth process inputs and one quality figure, the shape of a lab's or
  a plant's quality records (the size the tuning-speed figures are taken at);
* :func:`competing` — a linear trend, a kink and a wave: no single kernel family owns it, so
  rbf, Matérn and laplacian kernels score close to one another and ``--kernel auto`` has a
  real race to run;
* :func:`fine_sine` — 15 periods of a sine on one input (the tuning tests' width-range case).
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
