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
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from service.store import Store
from trainer import envelope_stats
from trainer.calibration import split_conformal_section
from trainer.errors import UserError
from trainer.manifest import build_manifest, nystrom_training, time_span
from trainer.nystrom import numerics
from trainer.nystrom.cg_fit import FinalFit, choose_solver, fit_cg, ridge_candidates
from trainer.nystrom.parts import Plan
from trainer.nystrom.pass2 import run_pass2
from trainer.nystrom.rank import rank_check
from trainer.nystrom.scan import Scan, scan
from trainer.nystrom.scores import predictor, score_parts
from trainer.nystrom.tune import final_ridge, sample_problem, tune_on_sample
from trainer.plan import explicit_spec
from trainer.precision import precision_check
from trainer.publish import bundle_arrays, publish_and_summarize
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


@dataclass
class Pass1:
    """Pass 1's findings, resolved: what every later stage of the job reads."""

    src: Source
    features: list[str]
    targets: list[str]
    scan: Scan
    mean: np.ndarray
    scale: np.ndarray
    fractions: tuple[float, float, float]  # validate, holdout, calibrate
    time_column: str | None
    times: np.ndarray | None
    cuts: tuple[float, float, float] | None

    @property
    def sample_s(self) -> np.ndarray:
        return (self.scan.sample[:, :len(self.features)] - self.mean) / self.scale

    def training_sample(self) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
        """(x_s, y, time) of the sample rows that pass 2 puts in the training part."""
        sc, d = self.scan, len(self.features)
        if self.cuts is not None:
            in_train = sc.sample_time < self.cuts[0]
        else:
            in_train = parts_of_keys(sc.sample_part_key, self.fractions) == 0
        x_s, y = self.sample_s[in_train], sc.sample[in_train, d:]
        if x_s.shape[0] < 10:
            raise UserError(f"{self.src.path}: too few training rows for Nyström "
                            f"({x_s.shape[0]})")
        return x_s, y, sc.sample_time[in_train] if self.cuts is not None else None


def first_pass(opts, progress) -> Pass1:
    """Read the file once: checks, counts, standardization, ranges, sample; the parts' sizes."""
    src = Source(opts.data, opts.sep, opts.decimal)
    features = feature_names(src, opts.targets, opts.features, opts.time)
    block_bytes = int(os.environ.get("KRIDGE_BLOCK_BYTES") or BLOCK_BYTES)
    sc = scan(src, features, list(opts.targets), opts.time, opts.drop_incomplete, opts.seed,
              block_bytes, progress)
    n = sc.count
    if n < 10:
        raise UserError(f"{src.path}: {n} usable rows; Nyström needs at least 10 (use "
                        "--method exact)")
    scale = np.sqrt(sc.m2 / n)
    scale[scale == 0] = 1.0
    fractions = part_fractions(n, opts.holdout)
    times = np.concatenate(sc.times) if opts.time else None
    cuts = time_cuts(times, *fractions) if times is not None else None
    return Pass1(src, features, list(opts.targets), sc, sc.mean, scale, fractions, opts.time,
                 times, cuts)


def choose_landmarks(opts, p1: Pass1, tr_s: np.ndarray, memory: int | None,
                     rng: np.random.Generator) -> tuple[np.ndarray, dict]:
    """(landmark rows, the manifest's account of them) from the sample's training rows."""
    fit_rows = int(p1.scan.count * (1 - sum(p1.fractions)))
    m = opts.landmarks or numerics.default_landmarks(fit_rows, memory)
    if m < 1:
        raise UserError(f"--landmarks must be at least 1, got {m}")
    m = min(m, tr_s.shape[0])
    scheme = opts.landmark_scheme or "uniform"
    landmarks = np.ascontiguousarray(tr_s[numerics.pick_landmarks(tr_s, m, scheme, rng)])
    return landmarks, {
        "count": int(m), "scheme": scheme,
        "from": f"the {tr_s.shape[0]} training rows of a uniform sample of "
                f"{p1.scan.sample.shape[0]} rows"}


def refine_ridge(path, spec, landmarks, held, ridge: float, problem, tuning_info,
                 train_rows: int) -> float:
    """The final ridge on the validation part with every training row's sums, recorded."""
    val = held["validate"]
    if problem is None or val.x.shape[0] < 2:
        return ridge
    grow = train_rows / max(problem.x_s.shape[0], 1)
    ridge = final_ridge(path, spec, landmarks, val, ridge, grow, problem.inv_var)
    tuning_info["final_ridge"] = {
        "ridge": ridge, "validation_rows": int(val.x.shape[0]),
        "how": "41 log-spaced values around the sample's choice, scored on the validation "
               "part with the sums of all training rows (validation MSE / Var(target), "
               "averaged over the targets)"}
    tuning_info["summary"] += f"; final ridge {ridge:.4g} on {val.x.shape[0]} validation rows"
    return ridge


def nystrom_envelope(p1: Pass1, seed: int) -> tuple[dict, np.ndarray, dict | None]:
    """(envelope, novelty reference, time span): ranges from every row, novelty from the
    sample."""
    d = len(p1.features)
    env, reference = envelope_stats.envelope_stats(p1.scan.sample[:, :d], p1.sample_s,
                                                   p1.features, seed)
    env["ranges"] = {f: {"min": float(p1.scan.lo[j]), "max": float(p1.scan.hi[j])}
                     for j, f in enumerate(p1.features)}
    env["ranges_from"] = f"all {p1.scan.count} training-file rows used"
    clock = p1.times is not None and is_clock(p1.src, p1.time_column)
    span = time_span(p1.time_column, p1.times, clock)
    if span:
        env["time_span"] = span
    return env, reference, span


def fit_direct(opts, plan: Plan, p1: Pass1, progress, ridge: float, problem, tuning_info
               ) -> FinalFit:
    """Pass 2's m × m sums, the eigendecompositions of K_mm and the normal matrix, and the
    final ridge among 41 values at no extra pass (:mod:`trainer.nystrom.numerics`)."""
    sums, held = run_pass2(plan, p1.scan.blocks, opts.cluster, progress)
    if sums.count < 2:
        raise UserError(f"{p1.src.path}: no training rows left for the final fit")
    path = numerics.ridge_path(plan.spec, plan.landmarks, sums)
    ridge = refine_ridge(path, plan.spec, plan.landmarks, held, ridge, problem, tuning_info,
                         sums.count)
    return FinalFit(path.dual(ridge), path.intercept, ridge, int(sums.count), held,
                    {"solver": "direct"}, int(path.rank))


def fit_with_cg(opts, plan: Plan, p1: Pass1, progress, ridge: float, problem, tuning_info
                ) -> FinalFit:
    """Pass 2 keeping the training rows, then preconditioned CG (:mod:`trainer.nystrom.cg`)
    for the sample's ridge and, when it was tuned, two scaled ones; the validation part
    picks among them."""
    train_rows = int(p1.scan.count * (1 - sum(p1.fractions)))
    grow = train_rows / max(problem.x_s.shape[0], 1) if problem is not None else 1.0
    tuned = problem is not None and opts.ridge is None
    fit = fit_cg(plan, p1.scan.blocks, opts.cluster, progress,
                 ridge_candidates(ridge, grow, tuned), problem.inv_var if tuned else None)
    if tuning_info is not None and "validation_scores" in fit.record:
        tuning_info["final_ridge"] = {
            "ridge": fit.ridge, "validation_rows": int(fit.held["validate"].x.shape[0]),
            "how": "the sample's ridge and it scaled by √(rows/sample rows) and by "
                   "rows/sample rows, each solved by CG with all training rows, scored on "
                   "the validation part (validation MSE / Var(target), averaged over the "
                   "targets)", "candidates": fit.record["ridges_solved"],
            "scores": fit.record["validation_scores"]}
        tuning_info["summary"] += (f"; final ridge {fit.ridge:.4g} of "
                                   f"{len(fit.record['ridges_solved'])} by CG on "
                                   f"{fit.held['validate'].x.shape[0]} validation rows")
    return fit


def train_nystrom(opts, store: Store, log, t0: float, reason: str) -> dict:
    """The Nyström job's stages (module notes); returns the train summary."""
    progress = _progress(opts.quiet)
    p1 = first_pass(opts, progress)
    tr_s, tr_y, tr_t = p1.training_sample()
    memory = _memory_bytes()
    rng = np.random.default_rng([opts.seed, 4])
    landmarks, landmark_info = choose_landmarks(opts, p1, tr_s, memory, rng)
    tuning_info = problem = None
    spec = explicit_spec(opts, len(p1.features))
    if spec is not None:
        ridge = float(opts.ridge)
    else:
        problem = sample_problem(tr_s, tr_y, tr_t, landmarks, opts.ridge, rng)
        spec, ridge, tuning_info = tune_on_sample(opts, problem, log,
                                                  np.random.default_rng([opts.seed, 6]))
    plan = Plan(str(p1.src.path), p1.src.sep, p1.src.decimal, p1.features, p1.targets,
                opts.time, opts.drop_incomplete, p1.mean, p1.scale, spec, landmarks, opts.seed,
                p1.fractions, p1.cuts)
    solver, solver_reason = choose_solver(opts.solver, landmarks.shape[0])
    t_fit = time.perf_counter()
    fit = (fit_with_cg if solver == "cg" else fit_direct)(
        opts, plan, p1, progress, ridge, problem, tuning_info)
    fit_seconds = time.perf_counter() - t_fit
    beta, ridge, sums_count, held = fit.beta, fit.ridge, fit.count, fit.held
    ranks = rank_check(spec, landmarks, np.random.default_rng([opts.seed, 7]))
    scored = score_parts(predictor(spec, landmarks, beta, fit.intercept), p1.targets, held,
                         opts.seed)
    env, reference, span = nystrom_envelope(p1, opts.seed)
    sc = p1.scan
    counts = row_counts(sc.rows_read, sc.with_target, sc.dropped, sc.count, p1.targets)
    parts = {"train": int(sums_count), **{p: int(h.x.shape[0]) for p, h in held.items()}}
    check = precision_check(opts.precision, spec, landmarks, beta, p1.sample_s[:5000],
                            p1.targets, sc.sample[:, len(p1.features):], log)
    landmark_info.update(rank_kept=fit.rank, rank_check=ranks, how_many=(
        f"--landmarks {opts.landmarks}" if opts.landmarks else
        numerics.describe_default(parts["train"], memory)))
    manifest = build_manifest(
        features=p1.features, targets=p1.targets, spec=spec, ridge=ridge,
        standardization={"mean": p1.mean.tolist(), "scale": p1.scale.tolist(), "ddof": 0,
                         "how": "streamed over every usable row (Chan et al. 1983)"},
        intercept=fit.intercept,
        training=nystrom_training(
            rows=int(sums_count), reason=reason, landmarks=landmark_info, parts=parts,
            src=p1.src, data=Path(opts.data).name, counts=counts, span=span,
            holdout=opts.holdout, by_time=p1.cuts is not None, seed=opts.seed,
            fit_seconds=fit_seconds, cluster=bool(opts.cluster),
            solve=dict(fit.record, reason=solver_reason)),
        tuning=tuning_info, metrics=scored.metrics, envelope=env,
        intervals=split_conformal_section(scored.calib, scored.coverage, p1.cuts is not None),
        precision=opts.precision, check=check)
    arrays = bundle_arrays(spec, landmarks, beta, reference, scored.calib)
    return publish_and_summarize(
        opts, store, manifest, arrays, (tuning_info, scored.holdout_points, scored.calib), t0,
        spec=spec, ridge=ridge, features=p1.features, rows=int(sums_count),
        metrics=scored.metrics, tuning_info=tuning_info, check=check, counts=counts,
        method=f"nystrom with {landmark_info['count']} {landmark_info['scheme']} landmarks "
               f"({reason}), {solver} solve ({solver_reason})",
        warnings=fit.warnings + ([ranks["warning"]] if ranks and ranks["warning"] else []))
