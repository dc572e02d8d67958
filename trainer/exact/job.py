"""The exact job: a data file held in memory → a model fitted on every row → published.

Order of work, so that every reported number is honest:

1. read and check the data; split off a seeded holdout (default 20 %);
2. choose kernel parameters and ridge on the training part only (explicit values are used
   exactly; omitted ones are tuned by cross-validation, see :mod:`trainer.tuning.search`);
3. score the training-part model on the holdout;
4. refit on *all* rows with the chosen parameters — this is the bundle — and compute its
   exact leave-one-out residuals, which calibrate the prediction intervals (the jackknife,
   see :mod:`trainer.calibration` for what that promises and what it does not);
5. compute the envelope, write the manifest (:mod:`trainer.manifest`) and arrays, publish
   atomically; warn when the holdout score is poor (:mod:`trainer.cautions`).
"""

from __future__ import annotations

import time

import numpy as np

from service.store import Store
from trainer import calibration, envelope_stats
from trainer.exact.fit import Fit, fit_exact
from trainer.manifest import exact_manifest, time_span
from trainer.metrics import per_target
from trainer.plan import TrainOptions, explicit_spec
from trainer.precision import precision_check
from trainer.publish import bundle_arrays, publish_and_summarize
from trainer.read import columns
from trainer.validation.splits import split_holdout


def choose_parameters(opts: TrainOptions, x_tr: np.ndarray, y_tr: np.ndarray, log,
                      time_ordered: bool = False):
    """(spec, ridge, tuning account): explicit parameters as given (no account); omitted ones
    tuned by :mod:`trainer.tuning.search`."""
    spec = explicit_spec(opts, x_tr.shape[1])
    if spec is not None:
        return spec, float(opts.ridge), None
    from trainer.tuning import search

    given = search.Given(opts.gamma, opts.degree, opts.coef0, opts.ridge)
    tuned = search.tune(x_tr, y_tr, kernel=opts.kernel, given=given, seed=opts.seed,
                        quiet=opts.quiet, log=log, time_ordered=time_ordered)
    return tuned.spec, tuned.ridge, tuned.account


def train_exact(opts: TrainOptions, store: Store, log, t0: float, reason: str) -> dict:
    """The exact job's stages (module notes); returns the train summary."""
    d = columns.load_training(opts.data, opts.targets, opts.features, opts.time,
                           opts.drop_incomplete, opts.sep, opts.decimal)
    features, x, y = d.features, d.x, d.y
    if d.time is not None:  # time order: the holdout is the latest stretch, folds run forward
        order = np.argsort(d.time, kind="stable")
        x, y, d.time = x[order], y[order], d.time[order]
    timed = d.time is not None
    n = x.shape[0]
    tr, ho = split_holdout(n, opts.holdout, opts.seed, most_recent=timed)

    spec, ridge, tuning_info = choose_parameters(opts, x[tr], y[tr], log, time_ordered=timed)

    metrics: dict = {}
    holdout_abs = None
    holdout_points = None
    held = calibration.HoldoutCheck(None, None)
    jackknife = calibration.uses_jackknife(n, timed)
    if ho.size:
        part = fit_exact(x[tr], y[tr], spec, ridge, want_loo=jackknife)
        pred = part.predict(x[ho])
        metrics["holdout"] = per_target(opts.targets, y[ho], pred)
        holdout_abs = np.abs(y[ho] - pred)
        holdout_points = {"actual": y[ho].tolist(), "predicted": pred.tolist()}
        if timed:
            holdout_points["time"] = d.time[ho].tolist()
        held = calibration.check_on_holdout(part, y[ho], pred, timed)

    t_fit = time.perf_counter()
    final: Fit = fit_exact(x, y, spec, ridge, want_loo=jackknife)
    fit_seconds = time.perf_counter() - t_fit
    if final.loo_residuals is not None:
        metrics["loo"] = per_target(opts.targets, y, y - final.loo_residuals)
    calib, intervals = calibration.calibrate(final, holdout_abs, held, timed)

    check = precision_check(opts.precision, spec, final.x_s, final.dual, final.x_s,
                            list(opts.targets), y, log)
    env, reference = envelope_stats.envelope_stats(x, final.x_s, features, opts.seed)
    span = time_span(d.time_column, d.time, d.time_is_clock)
    if span:
        env["time_span"] = span
    manifest = exact_manifest(
        opts, data=d, final=final, spec=spec, ridge=ridge, rows=n, holdout_rows=ho.size,
        timed=timed, span=span, fit_seconds=fit_seconds, reason=reason,
        tuning_info=tuning_info, metrics=metrics, envelope=env, intervals=intervals,
        check=check)
    arrays = bundle_arrays(spec, final.x_s, final.dual, reference, calib)

    report_args = (tuning_info, holdout_points, calib)
    return publish_and_summarize(opts, store, manifest, arrays, report_args, t0,
                                 spec=spec, ridge=ridge, features=features, rows=n,
                                 metrics=metrics, tuning_info=tuning_info, check=check,
                                 counts=d.counts, method=f"exact ({reason})")


