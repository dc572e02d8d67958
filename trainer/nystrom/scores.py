"""What a Nyström fit reports: held-out scores, split-conformal residuals, measured coverage.

The holdout scores the final model honestly and the calibration part gives split-conformal
intervals (Lei, G'Sell, Rinaldo, Tibshirani & Wasserman, JASA 2018), because the final model
never saw either part; their finite-sample guarantee holds for exchangeable rows, so not for
rows split in time order.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from service.kernels import KernelSpec, kernel_block
from trainer.metrics import per_target
from trainer.nystrom import numerics
from trainer.nystrom.parts import HeldRows

#: Holdout rows kept for the report's actual-against-predicted plot.
PLOT_ROWS = 5000


def predictor(spec: KernelSpec, landmarks: np.ndarray, beta: np.ndarray,
              intercept: np.ndarray) -> Callable[[np.ndarray], np.ndarray]:
    """f(x_s) = k(x_s, L)·β + ȳ on standardized rows, a block of rows at a time."""
    def predict(x_s: np.ndarray) -> np.ndarray:
        out = np.empty((x_s.shape[0], beta.shape[1]))
        for i in range(0, x_s.shape[0], numerics.SUB_ROWS):
            part = np.ascontiguousarray(x_s[i:i + numerics.SUB_ROWS])
            out[i:i + part.shape[0]] = kernel_block(spec, part, landmarks) @ beta + intercept
        return out
    return predict


@dataclass
class Scores:
    metrics: dict
    holdout_points: dict | None
    calib: np.ndarray | None  # |residuals| of the calibration part
    coverage: list | None


def score_parts(predict, targets: list[str], held: dict[str, HeldRows], seed: int) -> Scores:
    """Holdout and validation metrics, calibration residuals and holdout interval coverage."""
    from trainer.calibration import COVERAGE_LEVELS, interval_coverage

    metrics: dict = {}
    points = coverage = None
    hold, cal, val = held["holdout"], held["calibrate"], held["validate"]
    calib = np.abs(cal.y - predict(cal.x)) if cal.x.shape[0] else None
    if hold.x.shape[0]:
        ph = predict(hold.x)
        metrics["holdout"] = per_target(targets, hold.y, ph)
        keep = np.random.default_rng([seed, 5]).permutation(hold.x.shape[0])[:PLOT_ROWS]
        if hold.t is not None:
            keep = np.sort(keep)
        points = {"actual": hold.y[keep].tolist(), "predicted": ph[keep].tolist()}
        if hold.t is not None:
            points["time"] = hold.t[keep].tolist()
        if calib is not None:
            coverage = interval_coverage(calib, hold.y, ph, COVERAGE_LEVELS)
    if val.x.shape[0]:
        pv = predict(val.x)
        metrics["validation"] = per_target(targets, val.y, pv)
    return Scores(metrics, points, calib, coverage)


