"""Training-envelope statistics computed at fit time and stored in the manifest.

See :mod:`service.envelope` for how the service uses them. Calibration of the novelty
threshold τ is honest about self-distance: when the training set is small enough to be the
reference itself, each row's k-th neighbour distance is taken leaving that row out; when it
is larger, a random reference subset is kept and τ is calibrated on the rows *not* in it.
"""

from __future__ import annotations

import numpy as np

from service.envelope import NOVELTY_K, NOVELTY_QUANTILE, NeighbourIndex
from trainer.pca_limits import fit_pca_domain
from trainer.solvers import EnvelopeRows

#: Largest reference set kept for the novelty score. It bounds the score's per-request cost
#: to a small share of the kernel sum's (timings: DEVELOPERS.md, "Measured limits"); a
#: subsample only coarsens the score, since τ is calibrated on the rows left out of it.
REFERENCE_ROWS = 2000


def envelope_stats(
    x_raw: np.ndarray, x_s: np.ndarray, features: list[str], seed: int = 0
) -> tuple[dict, np.ndarray]:
    """Per-feature ranges and the novelty reference. Returns (manifest part, reference rows)."""
    n = x_s.shape[0]
    ranges = {
        f: {"min": float(x_raw[:, j].min()), "max": float(x_raw[:, j].max())}
        for j, f in enumerate(features)
    }
    k = min(NOVELTY_K, n - 1)
    if n <= REFERENCE_ROWS:
        reference = x_s
        calib = NeighbourIndex(reference, k).distances(x_s, skip_self=True)
        how = "leave-one-out k-th neighbour distance of every training row"
    else:
        rng = np.random.default_rng(seed)
        pick = np.zeros(n, dtype=bool)
        pick[rng.choice(n, REFERENCE_ROWS, replace=False)] = True
        reference = x_s[pick]
        calib = NeighbourIndex(reference, k).distances(x_s[~pick])
        how = (f"k-th neighbour distance to a random reference of {REFERENCE_ROWS} training "
               f"rows, measured on the {n - REFERENCE_ROWS} training rows outside it")
    tau = float(np.quantile(calib, NOVELTY_QUANTILE))
    if tau <= 0:
        tau = float(calib.max()) or 1.0
    novelty = {
        "method": "k-nearest-neighbour distance in standardized feature space "
                  "(Ramaswamy, Rastogi & Shim, SIGMOD 2000)",
        "k": int(k),
        "score": "novelty = d_k(x) / threshold_distance; novel when novelty > 1",
        "threshold_distance": tau,
        "calibration": f"{NOVELTY_QUANTILE} quantile of the {how}",
        "calibration_rows": int(calib.shape[0]),
        "reference_rows": int(reference.shape[0]),
        "training_rows_flagged": float(np.mean(calib > tau)),
    }
    return {"ranges": ranges, "novelty": novelty}, np.ascontiguousarray(reference)


def target_ranges(y: np.ndarray, targets: list[str]) -> dict:
    """Each target's training range: a prediction outside it is flagged."""
    y = np.asarray(y, dtype=np.float64).reshape(y.shape[0], -1)
    return {t: {"min": float(y[:, j].min()), "max": float(y[:, j].max())}
            for j, t in enumerate(targets)}


def training_envelope(rows: EnvelopeRows, features, seed: int, span: dict | None,
                      targets=()) -> tuple[dict, dict[str, np.ndarray]]:
    """The job's envelope stage: :func:`envelope_stats` of the solver's training rows, the
    ranges of every row when those are a sample, the time span, the targets' ranges and
    the PCA check (:mod:`trainer.pca_limits`). Returns (manifest part, bundle arrays:
    ``novelty_reference`` and, when fitted, the PCA arrays)."""
    env, reference = envelope_stats(rows.x_raw, rows.x_s, list(features), seed)
    sample = rows.ranges is not None
    if sample:
        env["ranges"], env["ranges_from"] = rows.ranges, rows.ranges_from
    if span:
        env["time_span"] = span
    n = rows.x_s.shape[0]
    where = (f"the {n} training rows of the uniform sample" if sample
             else f"all {n} training rows")
    if rows.y is not None and rows.y.shape[0] and targets:
        env["target_ranges"] = target_ranges(rows.y, list(targets))
        env["target_ranges_from"] = where
    pca, arrays = fit_pca_domain(rows.x_s, where)
    if pca is not None:
        env["pca"] = pca
    return env, {"novelty_reference": reference, **arrays}
