"""The Nyström solver: a file of any size → landmark rows and their dual, served like any
other bundle.

Its stages, as the job (:mod:`trainer.job`) calls them, in two passes over the file, block
by block (never the whole file in memory):

* read: pass 1 (:mod:`trainer.nystrom.scan`) checks and counts every row and gathers the
  standardization, ranges and a uniform sample; the job's split then gives every row its
  part by a rule (:class:`trainer.validation.splits.PartSplit`);
* tune: the landmarks are drawn from the sample's training-part rows, and the kernel and a
  first ridge are chosen on those rows (:mod:`trainer.nystrom.tune`);
* fit: pass 2 (:mod:`trainer.nystrom.pass2`, :mod:`trainer.nystrom.parts`) adds the
  training part into the Nyström sums (:mod:`trainer.nystrom.numerics`), here or on a Dask
  cluster, and keeps the held-out parts; the ridge is chosen once more with the full sums,
  and the served model predicts the held-out parts (:mod:`trainer.nystrom.scores`).

A solver that solves differently — an iterative preconditioned-CG one — subclasses
:class:`NystromSolver` and replaces :meth:`NystromSolver.solve`, keeping the scan, the
landmarks, the sample search and pass 2's parts.
"""

from __future__ import annotations

import os
import sys
import time
from dataclasses import dataclass

import numpy as np

from trainer.errors import UserError
from trainer.nystrom import numerics
from trainer.nystrom.cg_fit import choose_solver, solve_with_cg
from trainer.nystrom.parts import BlockPlan, HeldRows
from trainer.nystrom.pass2 import run_pass2
from trainer.nystrom.rank import rank_check
from trainer.nystrom.scan import Scan, scan
from trainer.nystrom.scores import held_predictions, predictor
from trainer.nystrom.tune import SampleProblem, final_ridge, sample_problem, tune_on_sample
from trainer.plan import Plan
from trainer.read.columns import is_clock, row_counts
from trainer.read.source import BLOCK_BYTES
from trainer.solvers import EnvelopeRows, Fitted, Log, Rows, Tuned
from trainer.validation.splits import PartSplit


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
class ScannedRows(Rows):
    """Pass 1's findings: the scan, and the standardization it gives."""

    scan: Scan
    mean: np.ndarray
    scale: np.ndarray

    def sample_s(self) -> np.ndarray:
        d = self.mean.shape[0]
        return (self.scan.sample[:, :d] - self.mean) / self.scale


@dataclass
class TrainingSample:
    """The sample rows that pass 2 puts in the training part."""

    x_raw: np.ndarray
    x_s: np.ndarray
    y: np.ndarray
    t: np.ndarray | None


@dataclass
class NystromTuned(Tuned):
    """The tune stage's choice, with the landmarks and the sample it was made on."""

    landmarks: np.ndarray
    landmark_info: dict
    sample: TrainingSample
    problem: SampleProblem | None  # None when every parameter was given
    memory: int | None


def training_sample(rows: ScannedRows, split: PartSplit, path) -> TrainingSample:
    """The sample's training-part rows (by the same rule pass 2 applies to every row)."""
    sc, d = rows.scan, rows.mean.shape[0]
    in_train = split.parts(sc.sample_part_key, sc.sample_time) == 0
    x_s = rows.sample_s()[in_train]
    if x_s.shape[0] < 10:
        raise UserError(f"{path}: too few training rows for Nyström ({x_s.shape[0]})")
    return TrainingSample(sc.sample[in_train, :d], x_s, sc.sample[in_train, d:],
                          sc.sample_time[in_train] if split.by_time else None)


def choose_landmarks(plan: Plan, rows: ScannedRows, split: PartSplit, tr_s: np.ndarray,
                     memory: int | None, rng: np.random.Generator) -> tuple[np.ndarray, dict]:
    """(landmark rows, the manifest's account of them) from the sample's training rows."""
    asked = plan.method.landmarks
    m = asked or numerics.default_landmarks(int(rows.count * split.training_share()), memory)
    if m < 1:
        raise UserError(f"--landmarks must be at least 1, got {m}")
    m = min(m, tr_s.shape[0])
    scheme = plan.method.landmark_scheme or "uniform"
    landmarks = np.ascontiguousarray(tr_s[numerics.pick_landmarks(tr_s, m, scheme, rng)])
    return landmarks, {
        "count": int(m), "scheme": scheme,
        "from": f"the {tr_s.shape[0]} training rows of a uniform sample of "
                f"{rows.scan.sample.shape[0]} rows"}


def refine_ridge(path, tuned: NystromTuned, held: dict[str, HeldRows],
                 train_rows: int) -> tuple[float, dict | None]:
    """(final ridge, tuning account with that step): the ridge on the validation part with
    every training row's sums."""
    val, problem, account = held["validate"], tuned.problem, tuned.account
    if problem is None or val.x.shape[0] < 2:
        return tuned.ridge, account
    grow = train_rows / max(problem.x_s.shape[0], 1)
    ridge = final_ridge(path, tuned.spec, tuned.landmarks, val, tuned.ridge, grow,
                        problem.inv_var)
    return ridge, {
        **account,
        "summary": account["summary"] + f"; final ridge {ridge:.4g} on {val.x.shape[0]} "
                                        "validation rows",
        "final_ridge": {
            "ridge": ridge, "validation_rows": int(val.x.shape[0]),
            "how": "41 log-spaced values around the sample's choice, scored on the "
                   "validation part with the sums of all training rows (validation MSE / "
                   "Var(target), averaged over the targets)"}}


def target_ridges(path, tuned: NystromTuned, val: HeldRows, train_rows: int) -> list[float]:
    """Each target's own ridge on the shared landmark system: the same 41 values around
    the sample's choice as :func:`~trainer.nystrom.tune.final_ridge`, each target scored by
    its own validation MSE (the kernel stays the one chosen for all targets)."""
    grow = train_rows / max(tuned.problem.x_s.shape[0], 1)
    ridges = np.geomspace(tuned.ridge * 1e-2, tuned.ridge * max(grow, 1.0) * 1e2, 41)
    res = numerics.validation_errors(path, tuned.spec, tuned.landmarks, val.x, val.y, ridges)
    return [float(ridges[i]) for i in np.argmin(np.mean(res**2, axis=1), axis=0)]


def _own_ridges(plan: Plan, tuned: NystromTuned, held: dict[str, HeldRows]) -> bool:
    """Whether the targets get ridges of their own (several, tuned, not --shared-kernel)."""
    return (len(plan.columns.targets) > 1 and not plan.parameters.shared
            and tuned.problem is not None and held["validate"].x.shape[0] >= 2)


def _stopped(record: dict) -> str:
    """', stopped by the validation rule after 60 iterations' for a CG solve ('' else)."""
    rules = sorted(set(record.get("stopped_by") or []))
    if not rules:
        return ""
    return (f", stopped by the {' and '.join(rules)} rule{'s' if len(rules) > 1 else ''} "
            f"after {record['iterations']} iterations")


#: The manifest's ``training.solver`` for a CG fit.
CG_TEXT = ("Nyström normal equations (K_nmᵀK_nm + ridge·K_mm)β = K_nmᵀ(y − ȳ), preconditioned "
           "conjugate gradient (FALKON's preconditioner, Rudi, Carratino & Rosasco 2017), K_nm "
           "formed tile by tile in every iteration")


class NystromSolver:
    """Nyström kernel ridge regression (module notes); see :class:`trainer.solvers.Solver`."""

    name = "nystrom"
    rows_in_memory = False
    offers_loo = False
    solver_text = ("Nyström normal equations (K_nmᵀK_nm + ridge·K_mm)β = K_nmᵀ(y − ȳ), "
                   "streamed sums, eigendecompositions of K_mm and of the m × m "
                   "normal matrix")

    def read(self, plan: Plan, log: Log) -> ScannedRows:
        """Pass 1: checks, counts, standardization, ranges, sample."""
        src, c = plan.source, plan.columns
        block_bytes = int(os.environ.get("KRIDGE_BLOCK_BYTES") or BLOCK_BYTES)
        sc = scan(src, list(c.features), list(c.targets), c.time, c.drop_incomplete,
                  plan.splits.seed, block_bytes, _progress(plan.output.quiet))
        n = sc.count
        if n < 10:
            raise UserError(f"{src.path}: {n} usable rows; Nyström needs at least 10 (use "
                            "--method exact)")
        scale = np.sqrt(sc.m2 / n)
        scale[scale == 0] = 1.0
        times = np.concatenate(sc.times) if c.time else None
        counts = row_counts(sc.rows_read, sc.with_target, sc.dropped, n, list(c.targets))
        clock = times is not None and is_clock(src, c.time)
        return ScannedRows(n, counts, times, clock, sc, sc.mean, scale)

    def tune(self, plan: Plan, rows: ScannedRows, split: PartSplit, log: Log) -> NystromTuned:
        """Landmarks from the sample's training rows, then the kernel and a first ridge."""
        sample = training_sample(rows, split, plan.source.path)
        memory = _memory_bytes()
        seed, p = plan.splits.seed, plan.parameters
        rng = np.random.default_rng([seed, 4])
        landmarks, info = choose_landmarks(plan, rows, split, sample.x_s, memory, rng)
        spec = p.explicit(len(plan.columns.features))
        if spec is not None:
            return NystromTuned(spec, float(p.ridge), None, landmarks, info, sample, None,
                                memory)
        problem = sample_problem(sample.x_s, sample.y, sample.t, landmarks, p.ridge, rng)
        spec, ridge, account = tune_on_sample(p, seed, problem, log,
                                              np.random.default_rng([seed, 6]))
        return NystromTuned(spec, ridge, account, landmarks, info, sample, problem, memory)

    def solve(self, plan: Plan, rows: ScannedRows, split: PartSplit, tuned: NystromTuned):
        """Pass 2 and the solve: (β, intercept, final ridge, tuning account, rank kept,
        training rows, held-out parts). ``--solver`` picks the direct solve or CG
        (:mod:`trainer.nystrom.cg_fit`); :attr:`solve_record` and :attr:`warnings` say how
        it went."""
        src, c = plan.source, plan.columns
        block_plan = BlockPlan(str(src.path), src.sep, src.decimal, list(c.features),
                               list(c.targets), c.time, c.drop_incomplete, rows.mean,
                               rows.scale, tuned.spec, tuned.landmarks, plan.splits.seed,
                               split, time_rule=src.time_rule)
        solver, why = choose_solver(plan.method.solver, tuned.landmarks.shape[0])
        self.solve_record, self.warnings = {"solver": solver, "reason": why}, []
        self.per_target = None  # each target's (kernel, ridge) when the ridges are their own
        if solver == "cg":
            fit = solve_with_cg(block_plan, rows.scan.blocks, plan.method.cluster,
                                _progress(plan.output.quiet), tuned, why, plan.method.cg_stop,
                                plan.method.cg_max_iter)
            self.solve_record, self.warnings = fit.record, fit.warnings
            return (fit.beta, fit.intercept, fit.ridge, fit.account, None, fit.count,
                    fit.held)
        sums, held = run_pass2(block_plan, rows.scan.blocks, plan.method.cluster,
                               _progress(plan.output.quiet))
        if sums.count < 2:
            raise UserError(f"{src.path}: no training rows left for the final fit")
        path = numerics.ridge_path(tuned.spec, tuned.landmarks, sums)
        ridge, account = refine_ridge(path, tuned, held, sums.count)
        beta = path.dual(ridge)
        if _own_ridges(plan, tuned, held):
            own = target_ridges(path, tuned, held["validate"], int(sums.count))
            beta = np.column_stack([path.dual(r)[:, j] for j, r in enumerate(own)])
            self.per_target = [(tuned.spec, r) for r in own]
            own_text = ", ".join(f"{t} {r:.4g}" for t, r in zip(plan.columns.targets, own,
                                                                 strict=True))
            account = dict(account, summary=account["summary"] + f"; each target's own "
                           f"ridge on the same rows: {own_text}", target_ridges={
                "ridges": dict(zip(plan.columns.targets, own, strict=True)),
                "how": "each target's validation MSE over the final ridge's 41 values; the "
                       "kernel is shared by all targets"})
        return (beta, path.intercept, ridge, account, int(path.rank), int(sums.count), held)

    def fit(self, plan: Plan, rows: ScannedRows, split: PartSplit, tuned: NystromTuned,
            want_loo: bool, log: Log) -> Fitted:
        """The solve, and the served model's predictions of the held-out parts (``want_loo``
        does not apply: the calibration part serves instead)."""
        t_fit = time.perf_counter()
        beta, intercept, ridge, account, rank, train_rows, held = self.solve(
            plan, rows, split, tuned)
        fit_seconds = time.perf_counter() - t_fit
        spec, landmarks, sc = tuned.spec, tuned.landmarks, rows.scan
        evidence = held_predictions(predictor(spec, landmarks, beta, intercept), held)
        parts = {"train": train_rows, **{p: int(h.x.shape[0]) for p, h in held.items()}}
        asked = plan.method.landmarks
        ranks = rank_check(spec, landmarks, np.random.default_rng([plan.splits.seed, 7]))
        landmark_info = dict(tuned.landmark_info, rank_kept=rank, rank_check=ranks, how_many=(
            f"--landmarks {asked}" if asked else
            numerics.describe_default(train_rows, tuned.memory)))
        features = plan.columns.features
        ranges = {f: {"min": float(sc.lo[j]), "max": float(sc.hi[j])}
                  for j, f in enumerate(features)}
        return Fitted(
            spec=spec, ridge=ridge, x_train=landmarks, dual=beta, intercept=intercept,
            standardization={"mean": rows.mean.tolist(), "scale": rows.scale.tolist(),
                             "ddof": 0,
                             "how": "streamed over every usable row (Chan et al. 1983)"},
            rows=train_rows, fit_seconds=fit_seconds, evidence=evidence,
            envelope=EnvelopeRows(tuned.sample.x_raw, tuned.sample.x_s, ranges,
                                  f"all {sc.count} training-file rows used",
                                  y=tuned.sample.y),
            check_rows=(rows.sample_s()[:5000], sc.sample[:, len(features):]),
            training={"landmarks": landmark_info, "parts": parts,
                      "solver": self.solver_text if self.solve_record["solver"] != "cg"
                      else CG_TEXT, "solve": self.solve_record,
                      "cluster": bool(plan.method.cluster),
                      "final_fit": "the training part only: holdout and calibration rows "
                                   "stay unseen"},
            tuning=account, per_target=self.per_target,
            described=f"nystrom with {landmark_info['count']} {landmark_info['scheme']} "
                      f"landmarks, {self.solve_record['solver']} solve "
                      f"({self.solve_record['reason']}){_stopped(self.solve_record)}",
            warnings=self.warnings + ([ranks["warning"]] if ranks and ranks["warning"]
                                      else []))
