"""The training job: one sequence of stages for every solver.

read → choose rows and columns → split (random or time) → tune → fit → calibrate →
envelope → manifest → publish. The options become a plan first (:mod:`trainer.plan`:
source, columns, method and why, splits, given and to-tune parameters). The solver
(:mod:`trainer.solvers`: exact or Nyström) supplies only what differs — how rows are read,
how parameters are tuned, how the model is fitted and what it offers the shared stages;
splitting (:mod:`trainer.validation.splits`), scoring (:mod:`trainer.metrics`), calibration
(:mod:`trainer.calibration`), the envelope (:mod:`trainer.envelope_stats`), the precision
check (:mod:`trainer.precision`), the manifest (:mod:`trainer.manifest`) and publishing
(:mod:`trainer.publish`) are called here, once per job.
"""

from __future__ import annotations

import time

from trainer import baselines, calibration, cautions, envelope_stats, manifest, metrics, publish
from trainer.plan import TrainOptions, resolve
from trainer.precision import precision_check
from trainer.solvers import Solver
from trainer.validation.splits import split_rows

__all__ = ["TrainOptions", "train"]


def solver_for(method: str) -> Solver:
    """The solver strategy of ``method`` (its libraries imported only when chosen)."""
    if method == "nystrom":
        from trainer.nystrom.solver import NystromSolver

        return NystromSolver()
    from trainer.exact.solver import ExactSolver

    return ExactSolver()


def train(opts: TrainOptions, log=print) -> dict:
    """Run the whole job; returns a summary (version, metrics, timings)."""
    t0 = time.perf_counter()
    plan, store = resolve(opts)
    solver = solver_for(plan.method.name)
    rows = solver.read(plan, log)
    # only rows held in memory carry groups (the plan refuses --group for Nyström)
    split = split_rows(rows.count, rows.times, plan.splits.holdout, plan.splits.seed,
                       solver.rows_in_memory, getattr(rows, "groups", None))
    tuned = solver.tune(plan, rows, split, log)
    want_loo = solver.offers_loo and calibration.uses_jackknife(
        rows.count, split.by_time or getattr(split, "groups", None) is not None)
    fitted = solver.fit(plan, rows, split, tuned, want_loo, log)
    scores = metrics.held_out_metrics(plan.columns.targets, fitted.evidence)
    calib, intervals = calibration.calibrate(fitted.evidence, split.by_time)
    span = manifest.time_span(plan.columns.time, rows.times, rows.clock,
                              plan.source.time_rule)
    envelope, envelope_arrays = envelope_stats.training_envelope(
        fitted.envelope, rows.encoding.columns if rows.encoding else plan.columns.features,
        plan.splits.seed, span, plan.columns.targets)
    check_x, check_y = fitted.check_rows
    specs = [s.spec for s in fitted.settings(list(plan.columns.targets))]
    check = precision_check(plan.output.precision, specs, fitted.x_train, fitted.dual,
                            check_x, list(plan.columns.targets), check_y, log)
    bundle = manifest.build_manifest(plan, rows, split, fitted, metrics=scores,
                                     envelope=envelope, intervals=intervals, check=check,
                                     span=span)
    train_mean = (fitted.evidence.train_mean if fitted.evidence.train_mean is not None
                  else fitted.intercept)
    bundle["baselines"] = baselines.holdout_baselines(list(plan.columns.targets),
                                                      fitted.evidence, train_mean, split.by_time)
    bundle["warnings"] = cautions.collect(bundle, fitted.warnings)
    arrays = publish.bundle_arrays(specs, fitted.x_train, fitted.dual, envelope_arrays,
                                   calib)
    report_args = (fitted.tuning, publish.report_points(fitted.evidence.holdout,
                                                        plan.splits.seed), calib)
    published = publish.publish(store, plan.output, bundle, arrays, report_args)
    return publish.summary(plan, store, published, fitted, bundle, rows.counts, t0)
