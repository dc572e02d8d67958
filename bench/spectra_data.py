"""A spectra-like data set of our own (invented, seeded): wide, smooth, correlated rows.

Each row is 100 absorbances on a wavelength grid, a mix of three smooth bands (Gaussian
peaks) whose heights are latent factors (fat, protein, water), a baseline offset, plus a
little white noise. The targets depend on the factors: ``fat`` is the first factor in %,
``protein`` the second. It is the shape of a near-infrared calibration table, where every
column moves with its neighbours and what matters is the shape of a row.

:func:`reversed_row` and :func:`ramp_row` make the two rows a per-feature range check cannot
see: the same values in reverse wavelength order, and a straight line across the training
span of every column.
"""

from __future__ import annotations

import numpy as np

COLUMNS = 100
FEATURES = [f"a{j:03d}" for j in range(COLUMNS)]
TARGETS = ["fat", "protein"]
#: Band centres and widths on a 0..1 grid, one per latent factor.
BANDS = ((0.25, 0.08), (0.55, 0.10), (0.8, 0.06))
NOISE = 0.01


def bands() -> np.ndarray:
    """(3, COLUMNS) band shapes."""
    grid = np.linspace(0.0, 1.0, COLUMNS)
    return np.array([np.exp(-0.5 * ((grid - c) / w) ** 2) for c, w in BANDS])


def factors(n: int, rng: np.random.Generator) -> np.ndarray:
    """(n, 4) latent factors: fat, protein, water contents (normal, around plausible means)
    and a baseline offset."""
    return np.column_stack([rng.normal(12.0, 3.0, n), rng.normal(20.0, 2.0, n),
                            rng.normal(60.0, 4.0, n), rng.normal(0.0, 0.05, n)])


def spectra(n: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """(n, COLUMNS) absorbances and (n, 2) targets (fat %, protein %)."""
    rng = np.random.default_rng(seed)
    f = factors(n, rng)
    x = (f[:, :3] / np.array([12.0, 20.0, 60.0])) @ bands() + f[:, 3:4]
    x += NOISE * rng.standard_normal(x.shape)
    y = np.column_stack([f[:, 0] + 0.1 * rng.standard_normal(n),
                         f[:, 1] + 0.1 * rng.standard_normal(n)])
    return x, y


def reversed_row(x: np.ndarray, i: int = 0) -> np.ndarray:
    """Row ``i`` of ``x`` with its columns in reverse order (a spectrum sent backwards)."""
    return x[i, ::-1].copy()


def ramp_row(x: np.ndarray) -> np.ndarray:
    """A straight line from the first column's training mean to the last column's."""
    mean = x.mean(axis=0)
    return np.linspace(mean[0], mean[-1], x.shape[1])


def write_csv(path, x: np.ndarray, y: np.ndarray) -> None:
    """The table as CSV with a header row: features, then targets."""
    header = ",".join(FEATURES + TARGETS)
    np.savetxt(path, np.hstack([x, y]), delimiter=",", header=header, comments="",
               fmt="%.6g")
