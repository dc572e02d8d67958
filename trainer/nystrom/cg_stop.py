"""When the CG solve stops: the validation rule (early stopping) beside the residual rule.

kridge's tuning picks tiny ridges on large data (the landmark count regularizes more than the
penalty), and such Nyström systems converge slowly even preconditioned; but the iterates'
error on unseen rows levels off long before the residual is small. Stopping CG early is a
regularizer in its own right (Yao, Rosasco & Caponnetto, "On early stopping in gradient
descent learning", Constructive Approximation 26, 2007; FALKON's analysis, Rudi, Carratino &
Rosasco 2017, Thm. 3, needs only t ≈ log n iterations), so the number of iterations is chosen
as the ridge is: on validation rows the fit never saw.

The rule, per column (one ridge and one target) of the solve: after every iteration the
iterate β_k predicts a fixed subsample of the job's validation part (at most
:data:`CHECK_ROWS` rows, drawn once with the job's seed; their kernel block K_val,m is
computed once); the column stops when its validation MSE has not fallen below
(1 − :data:`MIN_GAIN`) × its last such improvement for :data:`PATIENCE` iterations, and it
keeps the iterate with the lowest validation MSE seen. The residual rule and the iteration
cap still apply.
"""

from __future__ import annotations

import numpy as np

from service.kernels import KernelSpec, kernel_matrix

#: Validation rows the rule predicts after every iteration (K_val,m: 8·rows·m bytes, 320 MB
#: at 4,000 rows and 10,000 landmarks; each check costs rows·m·c multiply-adds, under 1 % of
#: an iteration's n·m kernel values for n ≥ 400,000).
CHECK_ROWS = 4000
#: A relative fall of the validation MSE smaller than this is no improvement: 1 % of the MSE
#: over :data:`PATIENCE` iterations, about 0.17 % of the RMSE per iteration, when each
#: iteration costs n·m kernel values (DEVELOPERS.md, "Measured limits", for the curve it was
#: read from and what the last fraction of a percent would have cost).
MIN_GAIN = 1e-2
#: Iterations without an improvement after which a column stops.
PATIENCE = 3


def check_rows(n: int, seed: int) -> np.ndarray:
    """Indices (sorted) of the validation rows the rule uses: all up to :data:`CHECK_ROWS`,
    else a uniform draw of that many with the job's seed."""
    if n <= CHECK_ROWS:
        return np.arange(n)
    return np.sort(np.random.default_rng([seed, 9]).choice(n, CHECK_ROWS, replace=False))


class ValidationStop:
    """The validation rule's state for the columns of one CG solve (module notes).

    Parameters
    ----------
    spec, landmarks : the kernel and landmark rows of the fit.
    x_val, y_val : the validation rows (standardized) and targets, (r, d) and (r, t).
    mean : ȳ, the intercept the predictions add.
    columns : c, the number of right-hand sides; column j predicts target ``j % t``.
    """

    def __init__(self, spec: KernelSpec, landmarks: np.ndarray, x_val: np.ndarray,
                 y_val: np.ndarray, mean: np.ndarray, columns: int):
        self.k_val = kernel_matrix(spec, x_val, landmarks)
        t = y_val.shape[1]
        self.y = y_val[:, np.arange(columns) % t] - mean[np.arange(columns) % t]
        self.rows = int(x_val.shape[0])
        self.best_mse = np.full(columns, np.inf)
        self.best_iteration = np.zeros(columns, dtype=int)
        self.best_beta: np.ndarray | None = None
        self._ref = np.full(columns, np.inf)
        self._gain_at = np.zeros(columns, dtype=int)
        self.history: list[list[float]] = []  # validation RMSE per iteration, per column
        self.start_rmse: list[float] | None = None  # a warm start's, iteration 0

    def _mse(self, beta: np.ndarray) -> np.ndarray:
        mse = np.mean((self.k_val @ beta - self.y) ** 2, axis=0)
        mse[~np.isfinite(mse)] = np.inf
        return mse

    def begin(self, beta: np.ndarray) -> None:
        """Score a warm start β₀ as iteration 0: the iterate kept if CG never beats it, and
        the level the first gain is measured from."""
        mse = self._mse(beta)
        self.start_rmse = [float(v) for v in np.sqrt(mse)]
        self.best_mse, self._ref = mse.copy(), mse.copy()
        self.best_beta = beta.copy()

    def update(self, iteration: int, beta: np.ndarray) -> np.ndarray:
        """Score the iterate β_k (m, c); True where a column has stalled (module notes)."""
        mse = self._mse(beta)
        self.history.append([float(v) for v in np.sqrt(mse)])
        if self.best_beta is None:
            self.best_beta = np.zeros_like(beta)
        better = mse < self.best_mse
        self.best_mse[better] = mse[better]
        self.best_iteration[better] = iteration
        self.best_beta[:, better] = beta[:, better]
        gained = mse < self._ref * (1.0 - MIN_GAIN)
        self._ref[gained] = mse[gained]
        self._gain_at[gained] = iteration
        return iteration - self._gain_at >= PATIENCE

    def record(self) -> dict:
        """The manifest's account of the rule."""
        return {"rows": self.rows, "min_gain": MIN_GAIN, "patience": PATIENCE,
                "best_iteration": [int(i) for i in self.best_iteration],
                "best_rmse": [float(v) for v in np.sqrt(self.best_mse)],
                "start_rmse": self.start_rmse,
                "rmse_by_iteration": [[round(v, 6) for v in row] for row in self.history]}


def rule_text(monitor: ValidationStop | None) -> str:
    """The stopping rule that ran, in words."""
    residual = ("the relative residual ‖Bᵀ(b − Hβ)‖ / ‖Bᵀb‖ of the preconditioned system ≤ "
                "tolerance, per column, or the iteration cap")
    if monitor is None:
        return residual
    return (f"per column, the first of: validation MSE on {monitor.rows} validation rows "
            f"not improved by {MIN_GAIN:g} (relative) for {PATIENCE} iterations (the iterate "
            f"with the lowest validation MSE is kept); {residual}")
