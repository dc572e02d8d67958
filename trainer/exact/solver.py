"""The exact solver: every row in memory, the kernel system solved by Cholesky.

Its stages, as the job (:mod:`trainer.job`) calls them:

* read: every usable row into memory (in time order with ``--time``, so that the holdout
  is the latest stretch and tuning folds run forward);
* tune: explicit parameters as given; omitted ones chosen on the training part only by
  :mod:`trainer.tuning.search` (exact leave-one-out, k-fold on a subsample, or time folds);
* fit: the training-part model scores the holdout; the served model is refitted on *all*
  rows with the chosen parameters. With ``want_loo`` both give their exact leave-one-out
  residuals: the served model's calibrate the intervals (the jackknife), the training-part
  model's measure on the holdout what that calibration achieves.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from trainer.data_checks import duplicate_rows
from trainer.exact.fit import fit_exact, fit_exact_each
from trainer.plan import Plan
from trainer.read import columns
from trainer.solvers import EnvelopeRows, Evidence, Fitted, Log, Predicted, Rows, Tuned
from trainer.validation.splits import HoldoutSplit


@dataclass
class RowsInMemory(Rows):
    """Every usable row: raw features (n, d) and targets (n, t)."""

    x: np.ndarray
    y: np.ndarray
    groups: np.ndarray | None = None  # (n,) group codes with --group
    group_names: list[str] | None = None


def group_record(column: str, groups: np.ndarray, holdout: np.ndarray) -> dict:
    """The manifest's ``training.group``: the column, how many groups, how many held out."""
    return {"column": column, "groups": int(np.unique(groups).size),
            "holdout_groups": int(np.unique(groups[holdout]).size),
            "how": "every row of a group on one side of the holdout and of each tuning fold"}


class ExactSolver:
    """Exact kernel ridge regression (module notes); see :class:`trainer.solvers.Solver`."""

    name = "exact"
    rows_in_memory = True
    offers_loo = True

    def read(self, plan: Plan, log: Log) -> RowsInMemory:
        c = plan.columns
        d = columns.read_rows(plan.source, c.targets, c.features, c.time, c.drop_incomplete,
                              c.text, c.group)
        x, y, t = d.x, d.y, d.time
        if t is not None:  # time order: the holdout is the latest stretch, folds run forward
            order = np.argsort(t, kind="stable")
            x, y, t = x[order], y[order], t[order]
        return RowsInMemory(x.shape[0], d.counts, t, d.time_is_clock, x, y,
                            encoding=d.encoding, groups=d.groups,
                            group_names=d.group_names)

    def tune(self, plan: Plan, rows: RowsInMemory, split: HoldoutSplit, log: Log) -> Tuned:
        p = plan.parameters
        spec = p.explicit(rows.x.shape[1])
        if spec is not None:
            return Tuned(spec, float(p.ridge), None)
        from trainer.tuning import search
        from trainer.tuning.each_target import tune_targets

        return tune_targets(rows.x[split.train], rows.y[split.train], list(plan.columns.targets),
                            kernel=p.kernel,
                            given=search.Given(p.gamma, p.degree, p.coef0, p.ridge),
                            seed=plan.splits.seed, quiet=plan.output.quiet, log=log,
                            time_ordered=split.by_time, shared=p.shared,
                            groups=None if rows.groups is None else rows.groups[split.train])

    def fit(self, plan: Plan, rows: RowsInMemory, split: HoldoutSplit, tuned: Tuned,
            want_loo: bool, log: Log) -> Fitted:
        x, y, spec, ridge = rows.x, rows.y, tuned.spec, tuned.ridge
        pairs = tuned.per_target

        def fit(xa: np.ndarray, ya: np.ndarray):
            if pairs is None:
                return fit_exact(xa, ya, spec, ridge, want_loo=want_loo)
            return fit_exact_each(xa, ya, pairs, want_loo=want_loo)

        tr, ho = split.train, split.holdout
        holdout = scorer_loo = last = None
        if ho.size:
            part = fit(x[tr], y[tr])
            holdout = Predicted(y[ho], part.predict(x[ho]),
                                rows.times[ho] if rows.times is not None else None)
            scorer_loo = part.loo_residuals
            last = y[tr[-1]] if split.by_time else None  # rows are in time order
        t_fit = time.perf_counter()
        final = fit(x, y)
        fit_seconds = time.perf_counter() - t_fit
        loo = (Predicted.from_residuals(y, final.loo_residuals)
               if final.loo_residuals is not None else None)
        return Fitted(
            spec=spec, ridge=ridge, x_train=final.x_s, dual=final.dual,
            intercept=final.intercept,
            standardization={"mean": final.scaler.mean.tolist(),
                             "scale": final.scaler.scale.tolist(), "ddof": 0},
            rows=rows.count, fit_seconds=fit_seconds,
            evidence=Evidence(holdout=holdout, loo=loo, scorer_loo=scorer_loo,
                              train_mean=y[tr].mean(axis=0), last_known=last),
            envelope=EnvelopeRows(x, final.x_s, y=y), check_rows=(final.x_s, y),
            training={"solver": "cholesky (scipy.linalg.cho_factor)",
                      "final_fit": "refitted on all rows with the chosen parameters",
                      "duplicates": duplicate_rows(x, tr, ho),
                      **({"group": group_record(plan.columns.group, rows.groups, ho)}
                         if rows.groups is not None else {})},
            tuning=tuned.account, described="exact", per_target=pairs)
