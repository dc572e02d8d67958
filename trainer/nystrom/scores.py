"""What a Nyström fit reports: held-out scores, split-conformal residuals and the manifest.

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


def training_section(*, rows: int, reason: str, landmarks: dict, parts: dict, src, data: str,
                     counts: dict, span, holdout: float, by_time: bool, seed: int,
                     fit_seconds: float, cluster: bool) -> dict:
    """The manifest's ``training`` entry: method, why, landmarks, rows and parts."""
    return {
        "rows": rows,
        "method": "nystrom",
        "method_reason": reason,
        "landmarks": landmarks,
        "parts": parts,
        "data_file": data,
        "data_sha256": src.sha256,
        "data_format": src.dialect(),
        "row_counts": counts,
        "time": span,
        "holdout_fraction": holdout,
        "holdout_rows": parts["holdout"],
        "holdout_kind": "the most recent rows in time" if by_time
        else "seeded random draw per block",
        "seed": seed,
        "fit_seconds": round(fit_seconds, 3),
        "solver": ("Nyström normal equations (K_nmᵀK_nm + ridge·K_mm)β = K_nmᵀ(y − ȳ), "
                   "streamed sums, eigendecompositions of K_mm and of the m × m "
                   "normal matrix"),
        "cluster": cluster,
        "final_fit": "the training part only: holdout and calibration rows stay unseen",
    }


def intervals_section(sc: Scores, by_time: bool) -> dict | None:
    """The manifest's ``intervals`` entry (None without a calibration part).

    The split-conformal guarantee needs exchangeable rows; rows in time order are not (the
    calibration stretch precedes the rows served), so there it is not claimed.
    """
    if sc.calib is None:
        return None
    promise = ("no finite-sample guarantee: rows in time order are not exchangeable, so "
               "read the coverage measured on the later holdout stretch" if by_time else
               "a finite-sample guarantee for rows exchangeable with the training data")
    return {
        "name": "split-conformal",
        "residuals": "calibration",
        "method": ("split-conformal: the ⌈(c+1)·coverage⌉-th smallest absolute residual "
                   "of the final model on a calibration part it never saw (Lei, G'Sell, "
                   f"Rinaldo, Tibshirani & Wasserman 2018): {promise}"),
        "calibration_rows": int(sc.calib.shape[0]),
        "holdout_coverage": sc.coverage,
        "holdout_coverage_method": None if sc.coverage is None else
        "calibration-part half-widths applied to the final model's holdout predictions",
    }
