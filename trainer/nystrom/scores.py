"""What a Nyström fit offers the job's scoring and calibration: the served model's
predictions of the parts it never saw.

The holdout scores the final model honestly and the calibration part gives split-conformal
intervals (:mod:`trainer.calibration`), because the final model never saw either part.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from service.kernels import KernelSpec, kernel_block
from trainer.nystrom import numerics
from trainer.nystrom.parts import HeldRows
from trainer.solvers import Evidence, Predicted


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


def held_predictions(predict, held: dict[str, HeldRows]) -> Evidence:
    """The served model's predictions of the held-out parts it never saw: the holdout
    scores it, the calibration part calibrates its intervals, the validation part chose
    its final ridge."""
    def predicted(rows: HeldRows) -> Predicted | None:
        return Predicted(rows.y, predict(rows.x), rows.t) if rows.x.shape[0] else None

    cal = held["calibrate"]  # offered even when empty: it, not the holdout, calibrates
    return Evidence(holdout=predicted(held["holdout"]), validation=predicted(held["validate"]),
                    calibration=Predicted(cal.y, predict(cal.x), cal.t))
