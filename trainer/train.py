"""The training job: data file → fitted model → published (and optionally released) bundle.

Order of work, so that every reported number is honest:

1. read and check the data; split off a seeded holdout (default 20 %);
2. choose kernel parameters and ridge on the training part only (explicit values are used
   exactly; omitted ones are tuned by cross-validation, see :mod:`trainer.tuning`);
3. score the training-part model on the holdout;
4. refit on *all* rows with the chosen parameters — this is the bundle — and compute its
   exact leave-one-out residuals, which calibrate the prediction intervals (the jackknife,
   see :mod:`trainer.calibration` for what that promises and what it does not);
5. compute the envelope, write the manifest (:mod:`trainer.manifest`) and arrays, publish
   atomically; warn when the holdout score is poor (:mod:`trainer.cautions`).
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from service.kernels import KERNEL_NAMES, KernelSpec, default_spec
from service.model import verifier
from service.store import Store
from trainer import calibration, cautions, data, envelope_stats
from trainer.errors import UserError
from trainer.fit import Fit, fit_exact, scores
from trainer.manifest import exact_manifest, time_span

#: ``--method auto``: exact KRR up to this many usable rows, Nyström above. An exact fit of
#: 15,000 rows holds a 1.8 GB kernel matrix (8 n² bytes); twice the rows cost four times the
#: memory and eight times the time (timings: DEVELOPERS.md, "Measured limits").
AUTO_EXACT_MAX_ROWS = 15_000


@dataclass
class TrainOptions:
    data: str
    targets: list[str]
    name: str
    features: list[str] | None = None
    kernel: str = "rbf"
    gamma: float | None = None
    degree: float | None = None
    coef0: float | None = None
    ridge: float | None = None
    holdout: float = 0.2
    seed: int = 0
    release: bool = False
    store: str | None = None
    quiet: bool = False
    report: bool = True
    precision: str = "float64"
    time: str | None = None
    drop_incomplete: bool = False
    sep: str | None = None
    decimal: str | None = None
    method: str = "auto"
    landmarks: int | None = None
    landmark_scheme: str | None = None
    cluster: str | None = None


def split_holdout(n: int, fraction: float, seed: int,
                  most_recent: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Split into (train indices, holdout indices): a seeded random draw, or with
    ``most_recent`` (rows in time order) the last ``fraction`` of the rows."""
    if not 0 <= fraction < 1:
        raise UserError(f"--holdout must be in [0, 1), got {fraction}")
    n_hold = int(round(n * fraction))
    if fraction > 0 and (n_hold < 1 or n - n_hold < data.MIN_ROWS):
        raise UserError(f"{n} rows are too few for a holdout of {fraction}; use --holdout 0")
    if most_recent:
        return np.arange(n - n_hold), np.arange(n - n_hold, n)
    perm = np.random.default_rng(seed).permutation(n)
    return np.sort(perm[n_hold:]), np.sort(perm[:n_hold])


def _per_target(targets: list[str], y: np.ndarray, pred: np.ndarray) -> dict:
    return {t: scores(y[:, j], pred[:, j]) for j, t in enumerate(targets)}


def precision_check(spec, x_train: np.ndarray, dual: np.ndarray, rows_s: np.ndarray,
                    targets: list[str], y: np.ndarray) -> dict:
    """Largest |float32 − float64| prediction difference on standardized rows ``rows_s``.

    Run when ``--precision float32`` is asked for, so the manifest states what single
    precision costs this model (it can be large when α is large and cancels, e.g. for a wide
    kernel with a tiny ridge).
    """
    from service.engine import Engine

    exact = Engine(spec, x_train, dual).predict(rows_s)
    single = Engine(spec, x_train, dual, dtype=np.float32).predict(rows_s)
    diff = np.abs(single - exact).max(axis=0)
    sd = y.std(axis=0)
    return {
        "rows": int(rows_s.shape[0]),
        "max_abs_error": {t: float(diff[j]) for j, t in enumerate(targets)},
        "relative_to_target_sd": {t: float(diff[j] / sd[j]) for j, t in enumerate(targets)},
        "how": "float32 engine against float64 engine on training rows",
    }


def explicit_spec(opts: TrainOptions, n_features: int) -> KernelSpec | None:
    """The kernel when the user gave it, every parameter it reads and the ridge; else None
    (something is left to tune)."""
    if opts.kernel == "auto" or opts.ridge is None or any(
            getattr(opts, p) is None for p in ("gamma", "degree", "coef0")
            if p in _params_of(opts.kernel)):
        return None
    return default_spec(opts.kernel, n_features, opts.gamma, opts.degree, opts.coef0)


def choose_parameters(opts: TrainOptions, x_tr: np.ndarray, y_tr: np.ndarray, log,
                      time_ordered: bool = False):
    """(spec, ridge, tuning account): explicit parameters as given (no account); omitted ones
    tuned by :mod:`trainer.tuning`."""
    spec = explicit_spec(opts, x_tr.shape[1])
    if spec is not None:
        return spec, float(opts.ridge), None
    from trainer import tuning

    given = tuning.Given(opts.gamma, opts.degree, opts.coef0, opts.ridge)
    tuned = tuning.tune(x_tr, y_tr, kernel=opts.kernel, given=given, seed=opts.seed,
                        quiet=opts.quiet, log=log, time_ordered=time_ordered)
    return tuned.spec, tuned.ridge, tuned.account


def _params_of(kernel: str) -> tuple[str, ...]:
    from service.kernels import KERNEL_PARAMS

    if kernel not in KERNEL_PARAMS:
        raise UserError(
            f"unknown kernel {kernel!r}; choose auto or one of {', '.join(KERNEL_NAMES)}")
    return KERNEL_PARAMS[kernel]


def choose_method(opts: TrainOptions) -> tuple[str, str]:
    """(method, reason): exact KRR up to :data:`AUTO_EXACT_MAX_ROWS` usable rows, else Nyström.

    ``auto`` counts the rows that have every target (one streamed pass over the target
    columns only), since sparse lab values can make a large export a small training set.
    """
    if opts.method == "exact":
        if opts.cluster:
            raise UserError("--cluster runs the Nyström accumulation; use --method nystrom")
        return "exact", "asked for with --method exact"
    if opts.method == "nystrom" or opts.cluster or opts.landmarks:
        return "nystrom", "asked for with " + ("--method nystrom" if opts.method == "nystrom"
                                               else "--cluster" if opts.cluster
                                               else "--landmarks")
    if opts.method != "auto":
        raise UserError(f"--method must be exact, nystrom or auto, not {opts.method!r}")
    rows = data.count_target_rows(opts.data, opts.targets, opts.sep, opts.decimal)
    if rows <= AUTO_EXACT_MAX_ROWS:
        return "exact", (f"{rows} rows with a target ≤ {AUTO_EXACT_MAX_ROWS}: exact KRR "
                         "(--method auto)")
    return "nystrom", (f"{rows} rows with a target > {AUTO_EXACT_MAX_ROWS}: exact KRR would "
                       f"need an n × n matrix of {rows**2 * 8 / 1e9:.0f} GB (--method auto)")


def train(opts: TrainOptions, log=print) -> dict:
    """Run the whole job; returns a summary (version, metrics, timings)."""
    t0 = time.perf_counter()
    store = Store(opts.store)
    store.model_dir(opts.name)  # validates the name before any work
    if opts.kernel != "auto":
        _params_of(opts.kernel)
    if opts.precision not in ("float64", "float32"):
        raise UserError(f"--precision must be float64 or float32, not {opts.precision!r}")
    method, reason = choose_method(opts)
    if method == "nystrom":
        from trainer.nystrom_train import train_nystrom

        return train_nystrom(opts, store, log, t0, reason)
    d = data.load_training(opts.data, opts.targets, opts.features, opts.time,
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
        metrics["holdout"] = _per_target(opts.targets, y[ho], pred)
        holdout_abs = np.abs(y[ho] - pred)
        holdout_points = {"actual": y[ho].tolist(), "predicted": pred.tolist()}
        if timed:
            holdout_points["time"] = d.time[ho].tolist()
        held = calibration.check_on_holdout(part, y[ho], pred, timed)

    t_fit = time.perf_counter()
    final: Fit = fit_exact(x, y, spec, ridge, want_loo=jackknife)
    fit_seconds = time.perf_counter() - t_fit
    if final.loo_residuals is not None:
        metrics["loo"] = _per_target(opts.targets, y, y - final.loo_residuals)
    calib, intervals = calibration.calibrate(final, holdout_abs, held, timed)

    check = None
    if opts.precision == "float32":
        check = precision_check(spec, final.x_s, final.dual, final.x_s, list(opts.targets), y)
    if check and max(check["relative_to_target_sd"].values()) > 1e-3:
        log("warning: float32 changes predictions on training rows by up to "
            f"{max(check['relative_to_target_sd'].values()):.2g} target SD; consider float64")
    env, reference = envelope_stats.envelope_stats(x, final.x_s, features, opts.seed)
    span = time_span(d.time_column, d.time, d.time_is_clock)
    if span:
        env["time_span"] = span
    manifest = exact_manifest(
        opts, data=d, final=final, spec=spec, ridge=ridge, rows=n, holdout_rows=ho.size,
        timed=timed, span=span, fit_seconds=fit_seconds, reason=reason,
        tuning_info=tuning_info, metrics=metrics, envelope=env, intervals=intervals,
        check=check)
    # The laplacian's per-feature passes read X one feature at a time: store it column-major
    # so that serving processes read it from the shared memory map without a private copy.
    x_store = np.asfortranarray(final.x_s) if spec.uses == "l1" else final.x_s
    arrays = {"x_train": x_store, "dual": final.dual, "novelty_reference": reference}
    if calib is not None:
        arrays["abs_residuals"] = np.sort(calib, axis=0)

    report_args = (tuning_info, holdout_points, calib)
    return publish_and_summarize(opts, store, manifest, arrays, report_args, t0,
                                 spec=spec, ridge=ridge, features=features, rows=n,
                                 metrics=metrics, tuning_info=tuning_info, check=check,
                                 counts=d.counts, method=f"exact ({reason})")


def publish_and_summarize(opts: TrainOptions, store: Store, manifest: dict, arrays: dict,
                          report_args: tuple, t0: float, *, spec, ridge: float,
                          features: list[str], rows: int, metrics: dict, tuning_info,
                          check, counts: dict, method: str) -> dict:
    """Publish the version (with its report), release it when asked; the train summary."""
    extra = None
    if opts.report:
        from trainer import report

        def extra(folder, version):
            report.write_report(folder / "report.html", dict(manifest, version=version,
                                model=opts.name), *report_args)
    warnings = cautions.poor_holdout(metrics)
    version = store.publish(opts.name, manifest, arrays, extra_files=extra)
    live = False
    if opts.release:
        store.release(opts.name, version, check=verifier(store, opts.name))
        live = True
    return {
        "name": opts.name,
        "version": version,
        "live": live,
        "rows": int(rows),
        "data": counts["summary"],
        "method": method,
        "features": features,
        "targets": list(opts.targets),
        "kernel": spec.describe(),
        "ridge": ridge,
        "metrics": metrics,
        "tuning": tuning_info["summary"] if tuning_info else None,
        "precision": opts.precision,
        "precision_check": check,
        "report": (str(store.version_dir(opts.name, version) / "report.html")
                   if extra is not None else None),
        "seconds": round(time.perf_counter() - t0, 2),
        "store": str(store.root),
        "warnings": warnings,
    }
