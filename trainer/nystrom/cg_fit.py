"""The Nyström fit by preconditioned CG, as a stage of the Nyström job.

Pass 2 gives every row its part as for the direct solve, but keeps the training part's
standardized rows (here, or on the Dask workers that read them) instead of adding them into
m × m sums; :func:`trainer.nystrom.cg.solve_nystrom_cg` then passes over them once per
iteration. The final ridge is chosen on the validation part among a few values, all solved
side by side in the same passes (each with its own preconditioner factor, see
:mod:`trainer.nystrom.cg`).
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np

from trainer.errors import UserError
from trainer.nystrom import cg, cg_stop
from trainer.nystrom.cg_rows import LocalRows
from trainer.nystrom.cg_start import sample_start
from trainer.nystrom.parts import BlockPlan, HeldRows
from trainer.nystrom.pass2 import run_pass2
from trainer.nystrom.scores import predictor

#: ``--solver auto``: CG from this many landmarks on, the direct solve below (README,
#: "Large data: Nyström", for the measured crossover).
CG_FROM_LANDMARKS = 3000


def choose_solver(asked: str, m: int) -> tuple[str, str]:
    """(solver, reason) for m landmarks: ``direct`` or ``cg``."""
    if asked in ("direct", "cg"):
        return asked, f"asked for with --solver {asked}"
    if m >= CG_FROM_LANDMARKS:
        return "cg", f"{m} landmarks ≥ {CG_FROM_LANDMARKS} (--solver auto)"
    return "direct", f"{m} landmarks < {CG_FROM_LANDMARKS} (--solver auto)"


def ridge_candidates(ridge: float, grow: float, tuned: bool) -> list[float]:
    """The sample's ridge, and when it was tuned also that ridge scaled by √grow and by grow:
    from the same penalty to the same penalty per training row (the penalty is on a sum over
    rows; ``grow`` = training rows / sample fit rows)."""
    if not tuned or grow <= 1.0:
        return [ridge]
    return [ridge, ridge * np.sqrt(grow), ridge * grow]


@dataclass
class FinalFit:
    """The final Nyström fit, whichever solver made it."""

    beta: np.ndarray
    intercept: np.ndarray
    ridge: float
    count: int
    held: dict[str, HeldRows]
    record: dict  # the manifest's account of the solve
    rank: int | None = None  # the direct solve's rank of K_mm (CG does not decompose it)
    warnings: list[str] = field(default_factory=list)
    account: dict | None = None  # the tuning account with the final-ridge step


def _validation_scores(spec, landmarks, fit: cg.CgFit, val: HeldRows,
                       inv_var: np.ndarray) -> list[float]:
    """Validation MSE / Var(target), averaged over the targets, of each ridge's β."""
    return [float((np.mean((val.y - predictor(spec, landmarks, b, fit.intercept)(val.x)) ** 2,
                           axis=0) * inv_var).mean()) for b in fit.betas]


#: ``--cg-stop``: the rules that may stop CG (trainer.nystrom.cg_stop).
CG_STOPS = ("validation", "residual")


def _check_rows(val: HeldRows, seed: int, stop: str) -> tuple[np.ndarray, np.ndarray] | None:
    """The validation rows of the validation stopping rule (None: the residual rule only)."""
    if stop != "validation" or val.x.shape[0] < 2:
        return None
    pick = cg_stop.check_rows(val.x.shape[0], seed)
    return val.x[pick], val.y[pick]


def fit_cg(plan: BlockPlan, blocks: list, cluster: str | None, progress, ridges_for,
           inv_var: np.ndarray | None, tol: float = cg.CG_TOL,
           max_iter: int = cg.CG_MAX_ITER, stop: str = "validation",
           start: tuple[np.ndarray, dict] | None = None) -> FinalFit:
    """Pass 2 keeping the training rows, then CG for every candidate ridge
    (``ridges_for(training rows)``), stopped by ``stop``'s rule; the ridge with the lowest
    validation score is kept (the first when the validation part is empty or there is no
    criterion). ``start``: (β₀, its account) of :mod:`trainer.nystrom.cg_start`, or zero."""
    plan = replace(plan, keep_train=True)
    if cluster:
        from trainer.nystrom.cluster import ClusterRows  # Dask only with --cluster

        rows = ClusterRows(cluster, plan, blocks)
        d, t = len(plan.features), len(plan.targets)
        held = {p: HeldRows.stack([h[p] for h in rows.held_rows if p in h], d, t)
                for p in ("validate", "holdout", "calibrate")}
    else:
        _none, held = run_pass2(plan, blocks, None, progress)
        train = held.pop("train")
        rows = LocalRows(plan.spec, plan.landmarks, train.x, train.y, train.block_rows)
    try:
        if rows.count < 2:
            raise UserError(f"{plan.path}: no training rows left for the final fit")
        val = held["validate"]
        ridges = ridges_for(rows.count)
        if inv_var is None or val.x.shape[0] < 2:
            ridges = ridges[:1]
        fit = cg.solve_nystrom_cg(plan.spec, plan.landmarks, rows, rows.mean, rows.count,
                                  ridges, tol, max_iter, check=_check_rows(val, plan.seed, stop),
                                  start=None if start is None else start[0])
    finally:
        if cluster:
            rows.close()
    record = {"solver": "cg", **fit.run.record(tol, max_iter), "jitter": fit.jitter,
              "kernel_tiles": fit.tiles, "ridges_solved": [float(r) for r in ridges],
              "start": {"from": "zero"} if start is None else start[1]}
    best = 0
    if len(ridges) > 1:
        scores = _validation_scores(plan.spec, plan.landmarks, fit, val, inv_var)
        best = int(np.argmin(scores))
        record["validation_scores"] = scores
    t = len(plan.targets)
    capped = "cap" in fit.run.stopped_by[best * t:(best + 1) * t]
    warnings = [] if not capped else [
        f"CG stopped at its cap of {max_iter} iterations with relative residual "
        f"{fit.run.residuals.max():.2g} > {tol:g} before either stopping rule: β is CG's "
        "last iterate, not the solution of the Nyström system (a larger --cg-max-iter, a "
        "larger ridge or --solver direct converge)"]
    return FinalFit(fit.betas[best], fit.intercept, float(ridges[best]), fit.count, held,
                    record, None, warnings)


def solve_with_cg(block_plan: BlockPlan, blocks: list, cluster: str | None, progress,
                  tuned, reason: str, stop: str = "validation",
                  max_iter: int | None = None) -> FinalFit:
    """The Nyström solver's solve by CG: the sample's ridge and, when it was tuned, two
    scaled ones; the tuning account gains the final-ridge step."""
    problem, account = tuned.problem, tuned.account
    tuned_ridge = problem is not None and account is not None

    def ridges_for(count: int) -> list[float]:
        grow = count / max(problem.x_s.shape[0], 1) if problem is not None else 1.0
        return ridge_candidates(tuned.ridge, grow, tuned_ridge)

    start = None if problem is None else sample_start(
        tuned.spec, tuned.landmarks, problem, tuned.ridge, block_plan.seed)
    fit = fit_cg(block_plan, blocks, cluster, progress, ridges_for,
                 problem.inv_var if tuned_ridge else None, stop=stop,
                 max_iter=max_iter or cg.CG_MAX_ITER, start=start)
    fit.record["reason"] = reason
    if tuned_ridge and "validation_scores" in fit.record:
        val_rows = int(fit.held["validate"].x.shape[0])
        fit.account = {
            **account,
            "summary": account["summary"] + f"; final ridge {fit.ridge:.4g} of "
                       f"{len(fit.record['ridges_solved'])} by CG on {val_rows} validation rows",
            "final_ridge": {
                "ridge": fit.ridge, "validation_rows": val_rows,
                "how": "the sample's ridge and it scaled by √(rows/sample rows) and by "
                       "rows/sample rows, each solved by CG with all training rows, scored "
                       "on the validation part (validation MSE / Var(target), averaged over "
                       "the targets)", "candidates": fit.record["ridges_solved"],
                "scores": fit.record["validation_scores"]}}
    else:
        fit.account = account
    return fit
