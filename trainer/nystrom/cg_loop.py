"""The conjugate gradient loop of the Nyström CG solve, and its record for the manifest.

:mod:`trainer.nystrom.cg` has the system it solves and the preconditioner's derivation; here
the loop itself, several columns side by side, each with its own step sizes and stopping
point (residual, validation rule or cap), from zero or from a warm start.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from trainer.nystrom.cg_stop import ValidationStop, rule_text

#: Default stopping rule: relative residual in the preconditioned norm, and an iteration cap.
CG_TOL, CG_MAX_ITER = 1e-6, 100


@dataclass
class CgRun:
    """What a CG solve did, for the manifest."""

    beta: np.ndarray  # (m, c)
    iterations: int
    residuals: np.ndarray  # (c,) final relative residuals, preconditioned norm
    converged: bool
    seconds: float
    history: list[float] = field(default_factory=list)  # worst column's residual per step
    stopped_by: list[str] = field(default_factory=list)  # per column: residual|validation|cap
    column_iterations: list[int] = field(default_factory=list)
    monitor: ValidationStop | None = None

    def record(self, tol: float, max_iter: int) -> dict:
        return {"iterations": self.iterations, "max_iterations": max_iter, "tolerance": tol,
                "final_residual": float(self.residuals.max()),
                "converged": bool(self.converged), "seconds": round(self.seconds, 3),
                "stopping_rule": rule_text(self.monitor), "stopped_by": self.stopped_by,
                "column_iterations": self.column_iterations,
                "validation_check": None if self.monitor is None else self.monitor.record()}


#: Why a column stopped, by code (0: still running).
_STOP_WORDS = {1: "residual", 2: "validation", 3: "cap"}


def conjugate_gradient(h_times: Callable[[np.ndarray, np.ndarray], np.ndarray], b: np.ndarray,
                       precond, tol: float = CG_TOL, max_iter: int = CG_MAX_ITER,
                       monitor: ValidationStop | None = None,
                       start: tuple[np.ndarray, np.ndarray] | None = None) -> CgRun:
    """Solve H β = b column by column by CG on Bᵀ H B w = Bᵀ b, β = B w.

    Parameters
    ----------
    h_times : (v, cols) ↦ H v for an (m, k) matrix v holding the solve's columns ``cols``
        (one pass over the rows serves every column given).
    b : (m, c) right-hand sides.
    precond : :class:`Preconditioner` or :class:`NoPreconditioner`.
    monitor : the validation rule (:mod:`trainer.nystrom.cg_stop`), or None for the
        residual rule alone.
    start : (β₀, H β₀), a warm start (zero if None); the residual stays relative to ‖Bᵀb‖.

    Notes
    -----
    Hestenes & Stiefel's CG (J. Res. NBS 1952) on the preconditioned system, each column
    with its own step sizes; a column that met a stopping rule keeps its iterate (the
    validation rule: its best-scored one) while the others go on.
    """
    t0 = time.perf_counter()
    r = precond.apply_t(b)
    rs = np.einsum("ij,ij->j", r, r)
    rs0 = np.where(rs > 0, rs, 1.0)
    w = np.zeros_like(b)
    if start is not None:
        w = precond.inverse(start[0])
        r = precond.apply_t(b - start[1])
        rs = np.einsum("ij,ij->j", r, r)
        if monitor is not None:
            monitor.begin(start[0])
    p = r.copy()
    rel = np.sqrt(rs / rs0)
    history = [float(rel.max())]
    stop = np.where(rel <= tol, 1, 0)
    at = np.zeros(b.shape[1], dtype=int)
    it = 0
    while it < max_iter and (stop == 0).any():
        active = stop == 0
        # only the running columns pass over the rows: a stopped one no longer costs
        # its share of the products with the tiles
        cols = np.flatnonzero(active)
        q = np.zeros_like(p)
        q[:, cols] = precond.apply_t(h_times(precond.apply(p[:, cols], cols), cols), cols)
        pq = np.einsum("ij,ij->j", p, q)
        alpha = np.where(active & (pq > 0), rs / np.where(pq > 0, pq, 1.0), 0.0)
        w += p * alpha
        r -= q * alpha
        rs_new = np.einsum("ij,ij->j", r, r)
        beta = np.where(active, rs_new / np.where(rs > 0, rs, 1.0), 0.0)
        p = r + p * beta
        rs = np.where(active, rs_new, rs)
        rel = np.sqrt(rs / rs0)
        it += 1
        history.append(float(rel.max()))
        stop[active & (rel <= tol)] = 1
        if monitor is not None:
            stalled = monitor.update(it, precond.apply(w))
            stop[(stop == 0) & stalled] = 2
        at[active] = it
    stop[stop == 0] = 3
    beta_out = precond.apply(w)
    if monitor is not None:
        by_val = stop == 2
        beta_out[:, by_val] = monitor.best_beta[:, by_val]
    return CgRun(beta_out, it, rel, bool((rel <= tol).all()), time.perf_counter() - t0,
                 history, [_STOP_WORDS[int(c)] for c in stop], [int(i) for i in at], monitor)
