"""The Nyström training job: a file of any size → a bundle served like any other.

Two passes over the file, block by block (never the whole file in memory):

1. **scan**: check every row (a missing input is refused by line, or left out with
   ``--drop-incomplete``), count, standardization (mean and population SD merged across blocks:
   Chan, Golub & LeVeque, "Algorithms for computing the sample variance", 1983), per-feature
   ranges, the time column, and a seeded uniform sample of rows (the smallest random keys);
2. **sums**: every row gets a part — train, validate, holdout, calibrate — from a seeded
   random draw per block (or, with ``--time``, from its time: the latest rows are held out,
   the stretch before calibrates, the one before that validates). Train rows are added into
   the Nyström sums (:mod:`trainer.nystrom`); the other parts (capped in size) are kept.

The kernel width and a first ridge are chosen on the sample; the ridge is chosen again on
the full sums against the validation part (one eigendecomposition serves every ridge). The
holdout scores the final model honestly; the calibration part gives split-conformal
intervals with their finite-sample guarantee (Lei et al., JASA 2018), because the final
model never saw it. With ``--cluster`` the sums of pass 2 are computed by Dask workers,
each reading its own blocks, and added here in block order.
"""

from __future__ import annotations

import math
import os
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from service.kernels import KERNEL_PARAMS, KernelSpec, kernel_block
from service.store import Store, now_iso
from trainer import envelope_stats, nystrom
from trainer.data import feature_names, is_clock, row_counts, usable_rows
from trainer.errors import UserError
from trainer.fit import scores
from trainer.reader import BLOCK_BYTES, Block, Source

#: Rows kept in memory from pass 1 for landmarks, tuning and the novelty reference.
SAMPLE_ROWS = 50_000
#: Rows of the sample the width search fits on (the rest of the tuning rows validate).
TUNE_ROWS = 12_000
#: Caps on the parts held out of the final fit (their rows are kept in memory).
HOLDOUT_MAX, CALIBRATE_MAX, VALIDATE_MAX = 20_000, 10_000, 10_000
CALIBRATE_FRACTION = VALIDATE_FRACTION = 0.1
PARTS = ("train", "validate", "holdout", "calibrate")


@dataclass
class Plan:
    """What every block needs to know to do its share of pass 2 (sent to Dask workers)."""

    path: str
    sep: str
    decimal: str
    features: list[str]
    targets: list[str]
    time: str | None
    drop_incomplete: bool
    mean: np.ndarray
    scale: np.ndarray
    spec: KernelSpec
    landmarks: np.ndarray
    seed: int
    fractions: tuple[float, float, float]  # validate, holdout, calibrate (random parts)
    time_cuts: tuple[float, float, float] | None = None  # validate, calibrate, holdout starts


@dataclass
class BlockResult:
    sums: nystrom.Sums
    kept: dict = field(default_factory=dict)  # part → (x_s, y, t)


def _parts(plan: Plan, block: Block, n_rows: int, t: np.ndarray | None) -> np.ndarray:
    """Part index (0 train, 1 validate, 2 holdout, 3 calibrate) of every row of a block."""
    if plan.time_cuts is not None:
        v_cut, c_cut, h_cut = plan.time_cuts
        out = np.zeros(n_rows, dtype=np.int8)
        out[t >= v_cut] = 1
        out[t >= c_cut] = 3
        out[t >= h_cut] = 2
        return out
    u = np.random.default_rng([plan.seed, 2, block.index]).random(n_rows)
    fv, fh, fc = plan.fractions
    out = np.zeros(n_rows, dtype=np.int8)
    out[u < fv + fh + fc] = 3
    out[u < fv + fh] = 2
    out[u < fv] = 1
    return out


def block_sums(plan: Plan, block: Block, first_row: int) -> BlockResult:
    """Pass 2 for one block: sums of its train rows, and its other parts' rows.

    Runs locally or on a Dask worker (which opens the file itself); the result depends only
    on the block, never on which machine computed it.
    """
    src = Source(plan.path, plan.sep, plan.decimal)
    chunk = src.read_block(block, plan.features + plan.targets, plan.time, first_row)
    d = len(plan.features)
    keep = usable_rows(src, chunk, plan.features, plan.time, first_row,
                       plan.drop_incomplete)[0]
    t_all = chunk.time
    part = _parts(plan, block, keep.size, t_all)[keep]
    v = chunk.values[keep]
    x_s = (v[:, :d] - plan.mean) / plan.scale
    y = v[:, d:]
    t = t_all[keep] if t_all is not None else None
    train = part == 0
    sums = nystrom.accumulate(plan.spec, plan.landmarks, x_s[train], y[train])
    kept = {}
    for i, name in enumerate(PARTS[1:], start=1):
        sel = part == i
        if sel.any():
            kept[name] = (x_s[sel], y[sel], None if t is None else t[sel])
    return BlockResult(sums, kept)


# -- pass 1 -----------------------------------------------------------------------------------

@dataclass
class Scan:
    rows_read: int = 0
    with_target: int = 0
    dropped: int = 0
    count: int = 0
    mean: np.ndarray | None = None
    m2: np.ndarray | None = None
    lo: np.ndarray | None = None
    hi: np.ndarray | None = None
    times: list = field(default_factory=list)
    sample_keys: np.ndarray | None = None
    sample: np.ndarray | None = None  # (s, d + t) raw values
    sample_time: np.ndarray | None = None
    blocks: list = field(default_factory=list)  # (block, first data row)

    def add(self, x: np.ndarray) -> None:
        """Merge a block's mean and M2 (Chan, Golub & LeVeque 1983)."""
        nb = x.shape[0]
        if nb == 0:
            return
        mb = x.mean(axis=0)
        m2b = ((x - mb) ** 2).sum(axis=0)
        if self.count == 0:
            self.mean, self.m2 = mb, m2b
            self.lo, self.hi = x.min(axis=0), x.max(axis=0)
        else:
            n = self.count + nb
            delta = mb - self.mean
            self.mean = self.mean + delta * (nb / n)
            self.m2 = self.m2 + m2b + delta**2 * (self.count * nb / n)
            self.lo, self.hi = np.minimum(self.lo, x.min(axis=0)), np.maximum(self.hi,
                                                                              x.max(axis=0))
        self.count += nb

    def keep_sample(self, keys: np.ndarray, rows: np.ndarray, t: np.ndarray | None) -> None:
        """Keep the rows with the SAMPLE_ROWS smallest keys seen so far (a uniform sample)."""
        if self.sample is None:
            self.sample_keys, self.sample, self.sample_time = keys, rows, t
        else:
            self.sample_keys = np.concatenate([self.sample_keys, keys])
            self.sample = np.concatenate([self.sample, rows])
            if t is not None:
                self.sample_time = np.concatenate([self.sample_time, t])
        if self.sample_keys.size > SAMPLE_ROWS:
            top = np.argpartition(self.sample_keys, SAMPLE_ROWS - 1)[:SAMPLE_ROWS]
            top.sort()
            self.sample_keys, self.sample = self.sample_keys[top], self.sample[top]
            if self.sample_time is not None:
                self.sample_time = self.sample_time[top]


def scan(src: Source, features, targets, time_col, drop: bool, seed: int,
         block_bytes: int, progress) -> Scan:
    """Pass 1 (see the module notes); refuses a bad file before any fitting work."""
    d = len(features)
    out = Scan()
    if src.kind == "excel":
        raise UserError(f"{src.path}: Nyström training streams CSV or Parquet; convert the "
                        "spreadsheet, or train it exactly with --method exact")
    first_row = 0
    blocks = src.blocks(block_bytes)
    for block in progress(blocks, "scanning"):
        chunk = src.read_block(block, features + targets, time_col, first_row)
        v = chunk.values
        keep, has_target, bad = usable_rows(src, chunk, features, time_col, first_row, drop)
        out.blocks.append((block, first_row))
        out.rows_read += v.shape[0]
        out.with_target += int(has_target.sum())
        out.dropped += int(bad.sum())
        first_row += v.shape[0]
        rows = v[keep]
        out.add(rows[:, :d])
        t = chunk.time[keep] if chunk.time is not None else None
        if t is not None:
            out.times.append(t)
        keys = np.random.default_rng([seed, 1, block.index]).random(v.shape[0])[keep]
        out.keep_sample(keys, rows, t)
    return out


# -- tuning on the sample ---------------------------------------------------------------------

@dataclass
class SampleProblem:
    """Tuning rows from the sample: fit part and validation part (standardized)."""

    x_s: np.ndarray  # the fit rows (named as trainer.tuning's width search expects)
    y: np.ndarray
    x_val: np.ndarray
    y_val: np.ndarray
    landmarks: np.ndarray
    inv_var: np.ndarray
    ridge_fixed: float | None
    evaluated: int = 0


def _evaluate(problem: SampleProblem, spec: KernelSpec, ridges: np.ndarray | None = None):
    from trainer.tuning import RIDGE_GRID_SIZE, RIDGE_RELATIVE, Curve

    if ridges is None:
        ridges = (np.array([problem.ridge_fixed]) if problem.ridge_fixed is not None
                  else np.geomspace(*RIDGE_RELATIVE, RIDGE_GRID_SIZE))
    path = nystrom.ridge_path(spec, problem.landmarks,
                              nystrom.accumulate(spec, problem.landmarks, problem.x_s, problem.y))
    res = nystrom.validation_errors(path, spec, problem.landmarks, problem.x_val,
                                    problem.y_val, ridges)
    mse = np.mean(res**2, axis=1)
    score = (mse * problem.inv_var[None, :]).mean(axis=1)
    score[~np.isfinite(score)] = np.inf
    problem.evaluated += 1
    return Curve(spec, np.asarray(ridges, dtype=np.float64), score, np.sqrt(mse))


def tune_on_sample(opts, problem: SampleProblem, log) -> tuple[KernelSpec, float, dict]:
    """Kernel parameters and a first ridge on the sample (same width range as exact tuning)."""
    from trainer import tuning

    t0 = time.perf_counter()
    kernels = list(tuning.AUTO_KERNELS) if opts.kernel == "auto" else [opts.kernel]
    runner = lambda p, specs: [_evaluate(p, s) for s in specs]  # noqa: E731
    curves, ranges = [], {}
    for name in kernels:
        for base in tuning._kernel_candidates(name, opts):
            if "gamma" in KERNEL_PARAMS[name] and opts.gamma is None:
                got, ranges[name] = tuning._search_widths(problem, base, name, runner,
                                                          opts.seed)
            else:
                gamma = {"gamma": float(opts.gamma)} if "gamma" in KERNEL_PARAMS[name] else {}
                got = runner(problem, [KernelSpec(name, **gamma, **base)])
            curves += got
    best = min(curves, key=lambda c: c.best_score)
    if not math.isfinite(best.best_score):
        raise UserError("tuning found no usable parameters on the sample; give --gamma and "
                        "--ridge explicitly")
    ridge = float(best.ridges[best.best])
    seconds = time.perf_counter() - t0
    what = (f"validation error on a sample ({problem.x_s.shape[0]} fit rows, "
            f"{problem.x_val.shape[0]} validation rows, the same {problem.landmarks.shape[0]} "
            "landmarks)")
    rmse = ", ".join(f"{v:.4g}" for v in best.rmse[best.best])
    summary = (f"{best.spec.describe()}, ridge={ridge:.4g} chosen by {what} "
               f"({problem.evaluated} decompositions; validation RMSE {rmse}; {seconds:.1f} s)")
    log(f"tuning: {summary}")
    info = {
        "method": what + "; one eigendecomposition per kernel setting serves every ridge",
        "criterion": "validation MSE / Var(target), averaged over the targets",
        "error_label": "validation RMSE",
        "kernels": kernels,
        "searched": [p for p in ("gamma", "ridge") if getattr(opts, p) is None],
        "grid": {"gamma_range": ranges},
        "chosen": {"kernel": best.spec.name, "params": best.spec.params(), "ridge": ridge,
                   "score": best.best_score, "cv_rmse": [float(v) for v in best.rmse[best.best]]},
        "curves": [c.as_json() for c in curves],
        "decompositions": problem.evaluated,
        "seconds": round(seconds, 3),
        "summary": summary,
        "fallback": False,
    }
    return best.spec, ridge, info


# -- the job ----------------------------------------------------------------------------------

def _progress(quiet: bool):
    def wrap(items, desc):
        if quiet or not sys.stderr.isatty():
            return items
        from tqdm.auto import tqdm

        return tqdm(items, desc=desc, unit="block", leave=False, file=sys.stderr)
    return wrap


def _time_cuts(times: np.ndarray, fv: float, fh: float, fc: float) -> tuple[float, float, float]:
    """Start times of validate, calibrate and holdout parts: the latest stretches in time."""
    q = np.quantile(times, [1 - fh - fc - fv, 1 - fh - fc, 1 - fh])
    return float(q[0]), float(q[1]), float(q[2])


def run_pass2(plan: Plan, blocks: list, cluster: str | None, progress) -> list[BlockResult]:
    """Block results in block order, from this process or a Dask cluster."""
    if cluster:
        from trainer.cluster import map_blocks

        return map_blocks(cluster, plan, blocks)
    return [block_sums(plan, block, first) for block, first in progress(blocks, "fitting")]


def train_nystrom(opts, store: Store, log, t0: float, reason: str) -> dict:
    """The Nyström job (see the module notes); returns the train summary."""
    from trainer.calibration import COVERAGE_LEVELS, interval_coverage
    from trainer.manifest import library_versions, time_span
    from trainer.train import explicit_spec, publish_and_summarize

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
    fh = min(opts.holdout, HOLDOUT_MAX / n) if opts.holdout > 0 else 0.0
    fc = min(CALIBRATE_FRACTION, CALIBRATE_MAX / n)
    fv = min(VALIDATE_FRACTION, VALIDATE_MAX / n)
    times = np.concatenate(sc.times) if opts.time else None
    cuts = _time_cuts(times, fv, fh, fc) if times is not None else None

    # -- the sample: landmarks, width search, envelope --------------------------------------
    sample = sc.sample
    sample_s = (sample[:, :d] - mean) / scale
    sample_y = sample[:, d:]
    if cuts is not None:
        in_train = sc.sample_time < cuts[0]
    else:  # the sample's own split draw, independent of the parts of pass 2
        in_train = np.random.default_rng([opts.seed, 3]).random(sample.shape[0]) >= fv + fh + fc
    tr_s, tr_y = sample_s[in_train], sample_y[in_train]
    if tr_s.shape[0] < 10:
        raise UserError(f"{src.path}: too few training rows for Nyström ({tr_s.shape[0]})")
    m = opts.landmarks or nystrom.default_landmarks(int(n * (1 - fh - fc - fv)),
                                                    _memory_bytes())
    if m < 1:
        raise UserError(f"--landmarks must be at least 1, got {m}")
    m = min(m, tr_s.shape[0])
    scheme = opts.landmark_scheme or "uniform"
    rng = np.random.default_rng([opts.seed, 4])
    landmarks = np.ascontiguousarray(tr_s[nystrom.pick_landmarks(tr_s, m, scheme, rng)])

    tuning_info = None
    spec = explicit_spec(opts, d)
    if spec is not None:
        ridge = float(opts.ridge)
    else:
        order = np.argsort(sc.sample_time[in_train], kind="stable") if cuts else \
            rng.permutation(tr_s.shape[0])
        take = order[-int(TUNE_ROWS / 0.75):] if cuts else order[:int(TUNE_ROWS / 0.75)]
        cut = int(round(0.75 * take.size))
        fit_i, val_i = take[:cut], take[cut:]
        var = tr_y.var(axis=0)
        var[var <= 0] = 1.0
        problem = SampleProblem(tr_s[fit_i], tr_y[fit_i], tr_s[val_i], tr_y[val_i], landmarks,
                                1.0 / var, opts.ridge)
        spec, ridge, tuning_info = tune_on_sample(opts, problem, log)

    # -- pass 2: the sums -------------------------------------------------------------------
    plan = Plan(str(src.path), src.sep, src.decimal, features, targets, opts.time,
                opts.drop_incomplete, mean, scale, spec, landmarks, opts.seed, (fv, fh, fc),
                cuts)
    t_fit = time.perf_counter()
    results = run_pass2(plan, sc.blocks, opts.cluster, progress)
    sums = nystrom.Sums.zeros(m, len(targets))
    held: dict[str, list] = {p: [] for p in PARTS[1:]}
    for res in results:  # fixed block order: the same sums whoever computed them
        sums.add(res.sums)
        for part, rows in res.kept.items():
            held[part].append(rows)
    held_rows = {p: _stack(v, d, len(targets)) for p, v in held.items()}
    if sums.count < 2:
        raise UserError(f"{src.path}: no training rows left for the final fit")
    path = nystrom.ridge_path(spec, landmarks, sums)

    # the ridge once more, on all training rows, against the validation part
    xv, yv, _ = held_rows["validate"]
    if opts.ridge is None and xv.shape[0] >= 2:
        grow = sums.count / max(problem.x_s.shape[0], 1) if tuning_info else 1.0
        ridges = np.geomspace(ridge * 1e-2, ridge * max(grow, 1.0) * 1e2, 41)
        res = nystrom.validation_errors(path, spec, landmarks, xv, yv, ridges)
        best = int(np.argmin(np.mean(res**2, axis=(1, 2)) if res.size else [0]))
        ridge = float(ridges[best])
        if tuning_info:
            tuning_info["final_ridge"] = {
                "ridge": ridge, "validation_rows": int(xv.shape[0]),
                "how": "41 log-spaced values around the sample's choice, scored on the "
                       "validation part with the sums of all training rows"}
            tuning_info["summary"] += f"; final ridge {ridge:.4g} on {xv.shape[0]} validation rows"
    beta = path.dual(ridge)
    intercept = path.intercept
    fit_seconds = time.perf_counter() - t_fit

    def predict_s(x_s: np.ndarray) -> np.ndarray:
        out = np.empty((x_s.shape[0], len(targets)))
        for i in range(0, x_s.shape[0], nystrom.SUB_ROWS):
            part = np.ascontiguousarray(x_s[i:i + nystrom.SUB_ROWS])
            out[i:i + part.shape[0]] = kernel_block(spec, part, landmarks) @ beta + intercept
        return out

    metrics: dict = {}
    holdout_points = None
    xh, yh, th = held_rows["holdout"]
    xc, yc, _ = held_rows["calibrate"]
    calib = np.abs(yc - predict_s(xc)) if xc.shape[0] else None
    coverage = None
    if xh.shape[0]:
        ph = predict_s(xh)
        metrics["holdout"] = {t: scores(yh[:, j], ph[:, j]) for j, t in enumerate(targets)}
        keep = np.random.default_rng([opts.seed, 5]).permutation(xh.shape[0])[:5000]
        if th is not None:
            keep = np.sort(keep)
        holdout_points = {"actual": yh[keep].tolist(), "predicted": ph[keep].tolist()}
        if th is not None:
            holdout_points["time"] = th[keep].tolist()
        if calib is not None:
            coverage = interval_coverage(calib, yh, ph, COVERAGE_LEVELS)
    if xv.shape[0]:
        pv = predict_s(xv)
        metrics["validation"] = {t: scores(yv[:, j], pv[:, j]) for j, t in enumerate(targets)}

    # -- envelope from pass 1 and the sample ------------------------------------------------
    env, reference = envelope_stats.envelope_stats(sample[:, :d], sample_s, features, opts.seed)
    env["ranges"] = {f: {"min": float(sc.lo[j]), "max": float(sc.hi[j])}
                     for j, f in enumerate(features)}
    env["ranges_from"] = f"all {n} training-file rows used"
    span = time_span(opts.time, times, bool(opts.time) and is_clock(src, opts.time))
    if span:
        env["time_span"] = span
    counts = row_counts(sc.rows_read, sc.with_target, sc.dropped, n, targets)
    parts = {"train": int(sums.count), **{p: int(v[0].shape[0]) for p, v in held_rows.items()}}

    check = None
    if opts.precision == "float32":
        from trainer.train import precision_check

        check = precision_check(spec, landmarks, beta, sample_s[:5000], targets, sample_y)
    manifest = {
        "created": now_iso(),
        "features": features,
        "targets": targets,
        "kernel": {"name": spec.name, "params": spec.params()},
        "ridge": ridge,
        "standardization": {"mean": mean.tolist(), "scale": scale.tolist(), "ddof": 0,
                            "how": "streamed over every usable row (Chan et al. 1983)"},
        "intercept": intercept.tolist(),
        "training": {
            "rows": int(sums.count),
            "method": "nystrom",
            "method_reason": reason,
            "landmarks": {"count": int(m), "scheme": scheme,
                          "from": f"a uniform sample of {sample.shape[0]} training rows",
                          "rank_kept": int(path.rank)},
            "parts": parts,
            "data_file": Path(opts.data).name,
            "data_sha256": src.sha256,
            "data_format": src.dialect(),
            "row_counts": counts,
            "time": span,
            "holdout_fraction": opts.holdout,
            "holdout_rows": parts["holdout"],
            "holdout_kind": ("the most recent rows in time" if cuts
                             else "seeded random draw per block"),
            "seed": opts.seed,
            "fit_seconds": round(fit_seconds, 3),
            "solver": ("Nyström normal equations (K_nmᵀK_nm + ridge·K_mm)β = K_nmᵀ(y − ȳ), "
                       "streamed sums, eigendecompositions of K_mm and of the m × m "
                       "normal matrix"),
            "cluster": bool(opts.cluster),
            "final_fit": "the training part only: holdout and calibration rows stay unseen",
        },
        "tuning": tuning_info,
        "metrics": metrics,
        "envelope": env,
        "intervals": None if calib is None else {
            "method": ("split-conformal: the ⌈(c+1)·coverage⌉-th smallest absolute residual "
                       "of the final model on a calibration part it never saw (Lei, G'Sell, "
                       "Rinaldo, Tibshirani & Wasserman 2018): a finite-sample guarantee for "
                       "rows like the training data"),
            "calibration_rows": int(calib.shape[0]),
            "holdout_coverage": coverage,
            "holdout_coverage_method": None if coverage is None else
            "calibration-part half-widths applied to the final model's holdout predictions",
        },
        "precision": opts.precision,
        "precision_check": check,
        "libraries": library_versions(),
    }
    x_store = np.asfortranarray(landmarks) if spec.uses == "l1" else landmarks
    arrays = {"x_train": x_store, "dual": beta, "novelty_reference": reference}
    if calib is not None:
        arrays["abs_residuals"] = np.sort(calib, axis=0)
    return publish_and_summarize(
        opts, store, manifest, arrays, (tuning_info, holdout_points, calib), t0, spec=spec,
        ridge=ridge, features=features, rows=int(sums.count), metrics=metrics,
        tuning_info=tuning_info, check=check, counts=counts,
        method=f"nystrom with {m} {scheme} landmarks ({reason})")


def _stack(rows: list, d: int, t: int):
    if not rows:
        return np.empty((0, d)), np.empty((0, t)), None
    x = np.concatenate([r[0] for r in rows])
    y = np.concatenate([r[1] for r in rows])
    tt = None if rows[0][2] is None else np.concatenate([r[2] for r in rows])
    return x, y, tt


def _memory_bytes() -> int | None:
    try:
        return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):
        return None
