"""The Nyström training job: a file of any size → a bundle served like any other.

Two passes over the file, block by block (never the whole file in memory): pass 1
(:mod:`trainer.nystrom.scan`) checks and counts every row and gathers the standardization,
ranges and a uniform sample; the landmarks are drawn from the sample's training rows and the
kernel width and a first ridge are chosen on the sample (:mod:`trainer.nystrom.tune`); pass 2
(:mod:`trainer.nystrom.parts`) splits the rows into parts and adds the training part into the
Nyström sums (:mod:`trainer.nystrom.numerics`), here or on a Dask cluster. The ridge is chosen once
more with the full sums, and the held-out parts score the model and calibrate its intervals
(:mod:`trainer.nystrom.scores`).
"""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path

import numpy as np

from service.store import Store, now_iso
from trainer import envelope_stats
from trainer.errors import UserError
from trainer.manifest import library_versions, time_span
from trainer.nystrom import numerics
from trainer.nystrom.parts import Plan
from trainer.nystrom.pass2 import run_pass2
from trainer.nystrom.scan import scan
from trainer.nystrom.scores import (
    intervals_section,
    predictor,
    score_parts,
    training_section,
)
from trainer.nystrom.tune import final_ridge, sample_problem, tune_on_sample
from trainer.plan import explicit_spec
from trainer.precision import precision_check
from trainer.publish import publish_and_summarize
from trainer.read.columns import feature_names, is_clock, row_counts
from trainer.read.source import BLOCK_BYTES, Source
from trainer.validation.splits import part_fractions, parts_of_keys, time_cuts


def _progress(quiet: bool):
    """A progress bar over blocks on a terminal (none with --quiet or when piped)."""
    def wrap(items, desc):
        if quiet or not sys.stderr.isatty():
            return items
        from tqdm.auto import tqdm

        return tqdm(items, desc=desc, unit="block", leave=False, file=sys.stderr)
    return wrap


def _memory_bytes() -> int | None:
    try:
        return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):
        return None


def train_nystrom(opts, store: Store, log, t0: float, reason: str) -> dict:
    """The Nyström job (see the module notes); returns the train summary."""

    src = Source(opts.data, opts.sep, opts.decimal)
    features = feature_names(src, opts.targets, opts.features, opts.time)
    targets = list(opts.targets)
    d = len(features)
    progress = _progress(opts.quiet)
    block_bytes = int(os.environ.get("KRIDGE_BLOCK_BYTES") or BLOCK_BYTES)
    sc = scan(src, features, targets, opts.time, opts.drop_incomplete, opts.seed,
              block_bytes, progress)
    n = sc.count
    if n < 10:
        raise UserError(f"{src.path}: {n} usable rows; Nyström needs at least 10 (use "
                        "--method exact)")
    scale = np.sqrt(sc.m2 / n)
    scale[scale == 0] = 1.0
    mean = sc.mean
    fv, fh, fc = part_fractions(n, opts.holdout)
    times = np.concatenate(sc.times) if opts.time else None
    cuts = time_cuts(times, fv, fh, fc) if times is not None else None

    # -- the sample: landmarks, width search, envelope --------------------------------------
    sample = sc.sample
    sample_s = (sample[:, :d] - mean) / scale
    sample_y = sample[:, d:]
    if cuts is not None:
        in_train = sc.sample_time < cuts[0]
    else:  # the part each sample row gets in pass 2
        in_train = parts_of_keys(sc.sample_part_key, (fv, fh, fc)) == 0
    tr_s, tr_y = sample_s[in_train], sample_y[in_train]
    if tr_s.shape[0] < 10:
        raise UserError(f"{src.path}: too few training rows for Nyström ({tr_s.shape[0]})")
    memory = _memory_bytes()
    m = opts.landmarks or numerics.default_landmarks(int(n * (1 - fh - fc - fv)), memory)
    if m < 1:
        raise UserError(f"--landmarks must be at least 1, got {m}")
    m = min(m, tr_s.shape[0])
    scheme = opts.landmark_scheme or "uniform"
    rng = np.random.default_rng([opts.seed, 4])
    landmarks = np.ascontiguousarray(tr_s[numerics.pick_landmarks(tr_s, m, scheme, rng)])

    tuning_info = problem = None
    spec = explicit_spec(opts, d)
    if spec is not None:
        ridge = float(opts.ridge)
    else:
        problem = sample_problem(tr_s, tr_y, sc.sample_time[in_train] if cuts else None,
                                 landmarks, opts.ridge, rng)
        spec, ridge, tuning_info = tune_on_sample(opts, problem, log,
                                                  np.random.default_rng([opts.seed, 6]))

    # -- pass 2: the sums -------------------------------------------------------------------
    plan = Plan(str(src.path), src.sep, src.decimal, features, targets, opts.time,
                opts.drop_incomplete, mean, scale, spec, landmarks, opts.seed, (fv, fh, fc),
                cuts)
    t_fit = time.perf_counter()
    sums, held = run_pass2(plan, sc.blocks, opts.cluster, progress)
    if sums.count < 2:
        raise UserError(f"{src.path}: no training rows left for the final fit")
    path = numerics.ridge_path(spec, landmarks, sums)
    val = held["validate"]
    if opts.ridge is None and val.x.shape[0] >= 2:
        grow = sums.count / max(problem.x_s.shape[0], 1) if problem else 1.0
        ridge = final_ridge(path, spec, landmarks, val, ridge, grow, problem.inv_var)
        if tuning_info:
            tuning_info["final_ridge"] = {
                "ridge": ridge, "validation_rows": int(val.x.shape[0]),
                "how": "41 log-spaced values around the sample's choice, scored on the "
                       "validation part with the sums of all training rows (validation MSE / "
                       "Var(target), averaged over the targets)"}
            tuning_info["summary"] += (f"; final ridge {ridge:.4g} on {val.x.shape[0]} "
                                       "validation rows")
    beta = path.dual(ridge)
    intercept = path.intercept
    fit_seconds = time.perf_counter() - t_fit
    scored = score_parts(predictor(spec, landmarks, beta, intercept), targets, held, opts.seed)

    # -- envelope from pass 1 and the sample ------------------------------------------------
    env, reference = envelope_stats.envelope_stats(sample[:, :d], sample_s, features, opts.seed)
    env["ranges"] = {f: {"min": float(sc.lo[j]), "max": float(sc.hi[j])}
                     for j, f in enumerate(features)}
    env["ranges_from"] = f"all {n} training-file rows used"
    span = time_span(opts.time, times, bool(opts.time) and is_clock(src, opts.time))
    if span:
        env["time_span"] = span
    counts = row_counts(sc.rows_read, sc.with_target, sc.dropped, n, targets)
    parts = {"train": int(sums.count), **{p: int(h.x.shape[0]) for p, h in held.items()}}
    check = precision_check(opts.precision, spec, landmarks, beta, sample_s[:5000], targets,
                            sample_y, log)
    landmark_info = {
        "count": int(m), "scheme": scheme, "rank_kept": int(path.rank),
        "from": f"the {tr_s.shape[0]} training rows of a uniform sample of "
                f"{sample.shape[0]} rows",
        "how_many": (f"--landmarks {opts.landmarks}" if opts.landmarks else
                     numerics.describe_default(parts["train"], memory))}
    manifest = {
        "created": now_iso(),
        "features": features,
        "targets": targets,
        "kernel": {"name": spec.name, "params": spec.params()},
        "ridge": ridge,
        "standardization": {"mean": mean.tolist(), "scale": scale.tolist(), "ddof": 0,
                            "how": "streamed over every usable row (Chan et al. 1983)"},
        "intercept": intercept.tolist(),
        "training": training_section(
            rows=int(sums.count), reason=reason, landmarks=landmark_info, parts=parts,
            src=src, data=Path(opts.data).name, counts=counts, span=span,
            holdout=opts.holdout, by_time=cuts is not None, seed=opts.seed,
            fit_seconds=fit_seconds, cluster=bool(opts.cluster)),
        "tuning": tuning_info,
        "metrics": scored.metrics,
        "envelope": env,
        "intervals": intervals_section(scored, cuts is not None),
        "precision": opts.precision,
        "precision_check": check,
        "libraries": library_versions(),
    }
    x_store = np.asfortranarray(landmarks) if spec.uses == "l1" else landmarks
    arrays = {"x_train": x_store, "dual": beta, "novelty_reference": reference}
    if scored.calib is not None:
        arrays["abs_residuals"] = np.sort(scored.calib, axis=0)
    return publish_and_summarize(
        opts, store, manifest, arrays, (tuning_info, scored.holdout_points, scored.calib), t0,
        spec=spec, ridge=ridge, features=features, rows=int(sums.count),
        metrics=scored.metrics, tuning_info=tuning_info, check=check, counts=counts,
        method=f"nystrom with {m} {scheme} landmarks ({reason})")
