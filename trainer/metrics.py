"""Per-target error metrics: the one place RMSE, MAE and R² are computed for every solver."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from trainer.solvers import Evidence


def scores(y_true: np.ndarray, y_pred: np.ndarray) -> dict[str, float]:
    """RMSE, MAE and R² (1 − SS_res/SS_tot) of one target."""
    err = y_true - y_pred
    ss_tot = float(((y_true - y_true.mean()) ** 2).sum())
    return {
        "rmse": float(np.sqrt(np.mean(err**2))),
        "mae": float(np.mean(np.abs(err))),
        "r2": float(1.0 - (err**2).sum() / ss_tot) if ss_tot > 0 else float("nan"),
        "rows": int(y_true.shape[0]),
    }


def per_target(targets: list[str], y: np.ndarray, pred: np.ndarray) -> dict:
    """{target: :func:`scores`} for (n, t) actual and predicted values."""
    return {t: scores(y[:, j], pred[:, j]) for j, t in enumerate(targets)}


def held_out_metrics(targets, evidence: Evidence) -> dict:
    """The manifest's ``metrics``: each kind of held-out prediction the solver offers,
    scored per target (holdout, validation part, the served model's exact LOO)."""
    kinds = (("holdout", evidence.holdout), ("validation", evidence.validation),
             ("loo", evidence.loo))
    return {name: per_target(list(targets), p.actual, p.predicted)
            for name, p in kinds if p is not None}
