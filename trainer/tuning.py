"""Automatic choice of kernel parameters and ridge by exact leave-one-out error.

How it works
------------
For one kernel parameter setting, the kernel matrix of the standardized training rows is
decomposed once, K = Q Λ Qᵀ (``scipy.linalg.eigh``, divide and conquer). For every ridge λ
the kernel ridge smoother is H(λ) = Q Λ(Λ + λI)⁻¹ Qᵀ, and the exact leave-one-out residual
of row i (standardization and intercept held fixed) is the PRESS identity

    r_i(λ) = (y_i − ŷ_i) / (1 − H_ii)

(Allen 1974; Golub, Heath & Wahba, "Generalized cross-validation as a method for choosing a
good ridge parameter", Technometrics 1979). With g_k = λ / (λ_k + λ) both parts are written
without cancellation, since y − ŷ = Q diag(g) Qᵀ y and 1 − H_ii = Σ_k Q_ik² g_k (the rows of Q
have unit norm). One O(n³) decomposition thus buys the whole ridge path at O(n²) per λ, done
as two matrix products over all ridge values at once.

The search
----------
* kernel widths (γ) on a log scale whose ends follow the data: from 0.05 / (90th percentile of
  the pairwise distance) — a kernel that is almost flat over the data — to 3 / (median nearest
  neighbour distance) — a kernel that barely reaches the next row. A series with fine structure
  has small neighbour distances, so its range reaches far enough; a fixed grid would not
  follow a rescaled or densely sampled input. A coarse grid of 8 widths, extended outwards
  when the best lies on an edge, then refined by two rounds of log-scale bisection around the
  best;
* ridge: 30 values from 1e-7 to 1e3 times the mean diagonal of K (for rbf-type kernels the
  diagonal is 1, so these are plain ridge values), then a finer grid between the best value's
  neighbours on the best kernel's decomposition;
* polynomial degree (2, 3) and, for the sigmoid kernel, coef0 (0, 1) when omitted. The
  polynomial coef0 is fixed to 1 when omitted: for c₀ > 0, (γ aᵀb + c₀)^d = c₀^d (γ/c₀ aᵀb + 1)^d,
  so any positive c₀ is the same model as c₀ = 1 with another γ and ridge;
* ``--kernel auto`` compares linear, polynomial, rbf, laplacian, Matérn 3/2 and 5/2 by the
  same criterion. The sigmoid kernel is not positive semi-definite in general and is only
  tuned when asked for by name.

Several targets: the criterion is the mean over targets of LOO MSE / Var(target), so targets
in different units weigh the same.

Above :data:`EXACT_MAX_ROWS` training rows the n³ decompositions get too slow, and the search
falls back to k-fold cross-validation on a random subsample (the fold systems are solved for
the whole ridge path through their own decompositions). The manifest says which was used.
"""

from __future__ import annotations

import logging
import math
import os
import sys
import time
from dataclasses import dataclass, field

import numpy as np
import scipy.linalg as sla
from threadpoolctl import threadpool_info

from service.kernels import KERNEL_PARAMS, KernelSpec, kernel_matrix
from trainer.errors import UserError
from trainer.fit import Standardizer, safe_lapack

#: Above this many training rows, tuning uses k-fold CV on a subsample instead of exact LOO.
#: Measured on this project's 2-core machines (scipy.linalg.eigh, driver "evd", rbf kernel,
#: other developers' jobs running): n = 2,000: 1.0 s; 4,000: 7.6 s; 6,000: 23 s per
#: decomposition, and one kernel's search needs about 13 of them (8 coarse widths, up to 2
#: edge extensions, 4 refinement steps, 1 for the ridge refinement): ≈ 100 s at 4,000 rows,
#: ≈ 5 min at 6,000. 4,000 keeps a single-kernel search under about two minutes.
EXACT_MAX_ROWS = 4000
#: Fallback: subsample size and number of folds (4 decompositions of 1,800 rows ≈ 3 s).
FALLBACK_ROWS = 2400
FALLBACK_FOLDS = 4
#: Blocked cross-validation in time order (``--time``): forward-chaining folds as in
#: scikit-learn's ``TimeSeriesSplit``, with a gap of this fraction of a fold between the end
#: of the training rows and the validation block, so that rows right before a validation
#: block (near-copies of it in an autocorrelated series) do not leak into its fit.
TIME_FOLDS = 5
TIME_GAP_FRACTION = 0.2
#: Ridge grid, relative to the mean diagonal of K.
RIDGE_RELATIVE = (1e-7, 1e3)
RIDGE_GRID_SIZE = 30
#: Coarse grid of kernel widths.
WIDTH_GRID_SIZE = 8
WIDTH_EXTENSIONS = 2
WIDTH_BISECTIONS = 2
#: From this many rows up to EXACT_MAX_ROWS, candidates run in separate processes (joblib's
#: loky backend), one BLAS thread each. Threads do not help: scipy's eigh holds the GIL, so
#: threaded candidates run one after another on one BLAS thread. Measured on a quiet 2-core
#: machine here, 8 rbf candidates at n = 3,000: two processes 21.8 s, one after another on 2
#: BLAS threads 24.8 s, two threads 38.9 s. Below ~1,000 rows a decomposition takes under
#: 0.2 s and starting worker processes costs more than it saves.
PARALLEL_FROM = 1000
#: Kernels compared by ``--kernel auto`` (sigmoid is indefinite in general: asked-for only).
AUTO_KERNELS = ("linear", "polynomial", "rbf", "laplacian", "matern32", "matern52")
#: 1 − H_ii below this (relative) counts as a row the smoother interpolates: LOO undefined.
LEVERAGE_FLOOR = 1e-10
#: A ridge whose system K + λI would have a reciprocal condition below this is not offered,
#: so the final Cholesky fit never meets a system the tuner thought fine.
RCOND_FLOOR = 1e-11
_DISTANCE_SAMPLE = 1000


# ---------------------------------------------------------------------------------------------
# closed-form leave-one-out


def eigen_kernel(k: np.ndarray, psd: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """Symmetric eigendecomposition K = Q diag(w) Qᵀ, overwriting ``k``.

    Parameters
    ----------
    k : (n, n) symmetric kernel matrix; destroyed.
    psd : the kernel is positive semi-definite, so negative eigenvalues are round-off and are
        set to 0 (they would otherwise make λ_k/(λ_k + λ) exceed 1 for tiny λ).

    Returns
    -------
    (w, Q) : eigenvalues ascending, orthonormal eigenvectors in the columns of Q.
    """
    n = k.shape[0]
    if not np.isfinite(k).all():
        raise FloatingPointError("kernel matrix has non-finite entries")
    with safe_lapack(n):  # large factorizations must stay on one BLAS thread (trainer.fit)
        w, q = sla.eigh(k, driver="evd", overwrite_a=True, check_finite=False)
    if psd:
        np.maximum(w, 0.0, out=w)
    return w, q


def loo_residuals(
    w: np.ndarray, q: np.ndarray, y_c: np.ndarray, ridges: np.ndarray
) -> np.ndarray:
    """Exact leave-one-out residuals of kernel ridge regression for many ridge values.

    Parameters
    ----------
    w, q : eigenvalues and eigenvectors of K (:func:`eigen_kernel`).
    y_c : (n, t) centered targets.
    ridges : (R,) ridge values λ > 0.

    Returns
    -------
    (R, n, t) residuals r_i = (y_i − ŷ_i)/(1 − H_ii), computed as
    [Q diag(g) Qᵀ y]_i / [Σ_k Q_ik² g_k] with g_k = λ/(w_k + λ); NaN where 1 − H_ii is below
    :data:`LEVERAGE_FLOOR` (the smoother interpolates that row: LOO is undefined).

    References
    ----------
    Allen (1974), Technometrics 16(1); Golub, Heath & Wahba (1979), Technometrics 21(2).
    """
    ridges = np.asarray(ridges, dtype=np.float64)
    n, t = y_c.shape
    g = ridges[None, :] / (w[:, None] + ridges[None, :])  # (n, R)
    qy = q.T @ y_c  # (n, t)
    numer = q @ (g[:, :, None] * qy[:, None, :]).reshape(n, -1)  # (n, R·t)
    denom = (q * q) @ g  # (n, R): 1 − H_ii, no cancellation
    numer = numer.reshape(n, ridges.size, t)
    with np.errstate(divide="ignore", invalid="ignore"):
        r = numer / denom[:, :, None]
    r[denom < LEVERAGE_FLOOR] = np.nan
    return np.moveaxis(r, 1, 0)


def feasible_ridges(w_raw: np.ndarray, ridges: np.ndarray) -> np.ndarray:
    """Mask of ridges for which K + λI is safely positive definite (condition guard)."""
    lo, hi = float(w_raw.min()), float(w_raw.max())
    return (ridges + lo) > RCOND_FLOOR * (ridges + max(hi, 0.0))


# ---------------------------------------------------------------------------------------------
# candidates and their evaluation


@dataclass
class Curve:
    """Error of one kernel parameter setting along the ridge grid."""

    spec: KernelSpec
    ridges: np.ndarray  # (R,)
    score: np.ndarray  # (R,) mean over targets of MSE / Var(y_t); inf where not allowed
    rmse: np.ndarray  # (R, t)
    failure: str | None = None  # why the candidate could not be evaluated at all

    @property
    def best(self) -> int:
        return int(np.argmin(self.score))

    @property
    def best_score(self) -> float:
        return float(self.score[self.best])

    def as_json(self) -> dict:
        ok = np.isfinite(self.score)
        return {
            "kernel": self.spec.name,
            "params": self.spec.params(),
            "ridge": [float(v) for v in self.ridges],
            "loo_rmse": [[float(v) for v in row] if good else None
                         for row, good in zip(self.rmse, ok, strict=True)],
            "score": [float(v) if good else None for v, good in zip(self.score, ok, strict=True)],
        }


@dataclass
class Problem:
    """Everything the evaluation of one candidate needs."""

    x_s: np.ndarray  # standardized training rows (or the subsample in the fallback)
    y_c: np.ndarray  # centered targets
    inv_var: np.ndarray  # (t,) 1 / Var(y_t)
    ridge_fixed: float | None
    folds: list[tuple[np.ndarray, np.ndarray]] | None = None  # k-fold: (train, validation)
    evaluated: int = 0
    seconds: float = 0.0
    extra: dict = field(default_factory=dict)

    def ridge_grid(self, k_diag_mean: float) -> np.ndarray:
        if self.ridge_fixed is not None:
            return np.array([self.ridge_fixed])
        scale = k_diag_mean if k_diag_mean > 0 and math.isfinite(k_diag_mean) else 1.0
        lo, hi = RIDGE_RELATIVE
        return scale * np.geomspace(lo, hi, RIDGE_GRID_SIZE)


def _score(res: np.ndarray, inv_var: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(R, m, t) residuals → criterion (R,) and RMSE (R, t); inf/NaN rows become inf."""
    mse = np.mean(res**2, axis=1)  # (R, t); NaN propagates
    score = (mse * inv_var[None, :]).mean(axis=1)
    score[~np.isfinite(score)] = np.inf
    return score, np.sqrt(mse)


def evaluate(problem: Problem, spec: KernelSpec, ridges: np.ndarray | None = None) -> Curve:
    """Cross-validated error of one kernel setting along a ridge grid (LOO or k-fold)."""
    t0 = time.perf_counter()
    psd = spec.name != "sigmoid"
    x = problem.x_s
    try:
        k = kernel_matrix(spec, x)
        diag_mean = float(np.mean(np.diag(k)))
        if ridges is None:
            ridges = problem.ridge_grid(diag_mean)
        if problem.folds is None:
            w, q = eigen_kernel(k, psd=False)
            ok = feasible_ridges(w, ridges)
            if psd:
                np.maximum(w, 0.0, out=w)
            res = loo_residuals(w, q, problem.y_c, ridges)
        else:
            res, ok = _kfold_residuals(k, problem.y_c, problem.folds, ridges, psd)
    except (FloatingPointError, np.linalg.LinAlgError) as exc:
        # the numerical failures a candidate may meet (non-finite kernel matrix, eigh not
        # converging): that candidate is unusable; anything else is a bug and propagates
        logging.getLogger("kridge.tuning").warning(
            "tuning: %s left out (%s: %s)", spec.describe(), type(exc).__name__, exc)
        ridges = np.asarray(ridges if ridges is not None else [np.nan])
        t = problem.y_c.shape[1]
        return Curve(spec, ridges, np.full(ridges.size, np.inf),
                     np.full((ridges.size, t), np.nan), failure=f"{type(exc).__name__}: {exc}")
    score, rmse = _score(res, problem.inv_var)
    score[~ok] = np.inf
    problem.evaluated += 1
    problem.seconds += time.perf_counter() - t0
    return Curve(spec, np.asarray(ridges, dtype=np.float64), score, rmse)


def _kfold_residuals(k, y_c, folds, ridges, psd):
    """Validation residuals of every fold for all ridges, one decomposition per fold.

    For training part T and validation part V: ŷ_V(λ) = K_VT Q diag(1/(w + λ)) Qᵀ y_T.
    Returns (R, Σ|V|, t) residuals in fold order and the feasible-ridge mask.
    """
    t = y_c.shape[1]
    out = np.empty((ridges.size, sum(len(v) for _, v in folds), t))
    ok = np.ones(ridges.size, dtype=bool)
    at = 0
    for tr, val in folds:
        w, q = eigen_kernel(np.ascontiguousarray(k[np.ix_(tr, tr)]), psd=False)
        ok &= feasible_ridges(w, ridges)
        if psd:
            np.maximum(w, 0.0, out=w)
        a = k[np.ix_(val, tr)] @ q  # (v, m)
        qy = q.T @ y_c[tr]  # (m, t)
        inv = 1.0 / (w[:, None] + ridges[None, :])  # (m, R)
        pred = a @ (inv[:, :, None] * qy[:, None, :]).reshape(len(tr), -1)
        out[:, at:at + len(val), :] = (y_c[val][None]
                                       - np.moveaxis(pred.reshape(len(val), ridges.size, t), 1, 0))
        at += len(val)
    return out, ok


def time_series_folds(n: int, n_splits: int = TIME_FOLDS,
                      gap: int | None = None) -> list[tuple[np.ndarray, np.ndarray]]:
    """Forward-chaining folds over rows in time order: (training rows, validation block).

    Validation blocks are the last ``n_splits`` contiguous blocks of ⌊n / (n_splits + 1)⌋ rows;
    each is fitted on every row before it except the ``gap`` rows right before it. This is
    the split of scikit-learn's ``TimeSeriesSplit(n_splits, gap=gap)``; ``gap`` defaults to
    :data:`TIME_GAP_FRACTION` of a block.
    """
    size = n // (n_splits + 1)
    if size < 1:
        raise UserError(f"{n} rows are too few for {n_splits} time-ordered folds")
    gap = int(round(TIME_GAP_FRACTION * size)) if gap is None else gap
    rows = np.arange(n)
    out = []
    for start in range(n - n_splits * size, n, size):
        train = rows[: max(start - gap, 0)]
        if train.size < 2:
            raise UserError(f"{n} rows are too few for {n_splits} time-ordered folds with a gap "
                            f"of {gap} rows")
        out.append((train, rows[start:start + size]))
    return out


# ---------------------------------------------------------------------------------------------
# kernel width range from the data


def width_range(name: str, x_s: np.ndarray, seed: int = 0) -> tuple[float, float]:
    """Data-driven (low, high) range for γ of kernel ``name`` on standardized rows.

    Distance kernels (k depends on γ·D, D the squared Euclidean or the L1 distance):
    low = 0.05 / q₉₀(D) and high = 3 / median nearest-neighbour D, from up to 1,000 sampled
    rows against all rows. Dot-product kernels (k depends on γ aᵀb): low = 0.01 / s,
    high = 3 / s with s the 90th percentile of |aᵀb|.
    """
    n = x_s.shape[0]
    rng = np.random.default_rng(seed)
    pick = rng.choice(n, size=min(n, _DISTANCE_SAMPLE), replace=False)
    sub = x_s[pick]
    if name in ("polynomial", "sigmoid"):
        s = float(np.quantile(np.abs(sub @ x_s.T), 0.9))
        s = s if s > 0 else 1.0
        return 0.01 / s, 3.0 / s
    if name == "laplacian":
        d = _l1_blocks(sub, x_s)
    else:
        d = (np.einsum("ij,ij->i", sub, sub)[:, None] - 2.0 * sub @ x_s.T
             + np.einsum("ij,ij->i", x_s, x_s)[None, :])
        np.maximum(d, 0.0, out=d)
    d[np.arange(len(pick)), pick] = np.inf  # a row is not its own neighbour
    positive = np.where(d > 1e-12, d, np.inf)
    nn = np.min(positive, axis=1)
    nn = nn[np.isfinite(nn)]
    far = d[np.isfinite(d)]
    q90 = float(np.quantile(far, 0.9)) if far.size else 1.0
    nn_med = float(np.median(nn)) if nn.size else q90
    lo, hi = 0.05 / max(q90, 1e-300), 3.0 / max(nn_med, 1e-300)
    if not hi > lo * 10:  # degenerate data (few distinct rows): still search two decades+
        hi = lo * 1e3
    return lo, hi


def _l1_blocks(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Pairwise L1 distances in row blocks of about 2 million (row, column, feature) cells."""
    rows = max(1, int(2e6 // max(b.shape[0] * b.shape[1], 1)))
    out = np.empty((a.shape[0], b.shape[0]))
    for i in range(0, a.shape[0], rows):
        out[i:i + rows] = np.abs(a[i:i + rows, None, :] - b[None, :, :]).sum(axis=2)
    return out


# ---------------------------------------------------------------------------------------------
# the search


def _make_runner(n: int, quiet: bool, total_hint: int, log):
    """A function evaluating a list of specs, in parallel where that pays, with progress."""
    from tqdm.auto import tqdm

    cores = os.cpu_count() or 1
    bar = tqdm(total=total_hint, desc="tuning", unit="fit", leave=False,
               disable=quiet or not sys.stderr.isatty(), file=sys.stderr)
    parallel = cores > 1 and PARALLEL_FROM <= n <= EXACT_MAX_ROWS
    blas_threads = max((p.get("num_threads", 1) for p in threadpool_info()
                        if p.get("user_api") == "blas"), default=1)
    if parallel:
        how = (f"candidates spread over {cores} worker processes with joblib, one BLAS thread "
               f"each (measured faster than one decomposition at a time on {blas_threads} "
               "BLAS threads)")
    else:
        how = (f"candidates one after another: BLAS already uses {blas_threads} thread(s) "
               f"for each n = {n} decomposition")

    def run(problem: Problem, specs: list[KernelSpec]) -> list[Curve]:
        if parallel and len(specs) > 1:
            from joblib import Parallel, delayed, parallel_config

            with parallel_config(backend="loky", inner_max_num_threads=1):
                out = Parallel(n_jobs=min(cores, len(specs)))(
                    delayed(evaluate)(problem, s) for s in specs)
            problem.evaluated += len(specs)  # the workers counted on their own copies
            bar.update(len(specs))
            return out
        out = []
        for s in specs:
            out.append(evaluate(problem, s))
            bar.update(1)
        return out

    def close() -> None:
        """Close the progress bar and end the worker processes (they would idle for minutes)."""
        bar.close()
        if parallel:
            from joblib.externals.loky import get_reusable_executor

            get_reusable_executor().shutdown(wait=True)

    run.how = how  # type: ignore[attr-defined]
    run.close = close  # type: ignore[attr-defined]
    return run


def _search_widths(problem, base: dict, name: str, runner, seed: int) -> tuple[list[Curve], list]:
    """Coarse log grid of γ, edge extensions, then log bisection around the best."""
    lo, hi = width_range(name, problem.x_s, seed)
    grid = list(np.geomspace(lo, hi, WIDTH_GRID_SIZE))
    make = lambda g: KernelSpec(name, gamma=float(g), **base)  # noqa: E731
    curves = runner(problem, [make(g) for g in grid])
    step = math.log(grid[1] / grid[0])
    # extend outwards while the best lies on an edge of what has been tried
    for _ in range(WIDTH_EXTENSIONS):
        gammas = [c.spec.gamma for c in curves]
        best = curves[int(np.argmin([c.best_score for c in curves]))]
        if best.spec.gamma == min(gammas):
            new = min(gammas) * math.exp(-step)
        elif best.spec.gamma == max(gammas):
            new = max(gammas) * math.exp(step)
        else:
            break
        curves += runner(problem, [make(new)])
    for _ in range(WIDTH_BISECTIONS):
        step /= 2
        best = curves[int(np.argmin([c.best_score for c in curves]))]
        g = best.spec.gamma
        curves += runner(problem, [make(g * math.exp(-step)), make(g * math.exp(step))])
    return curves, [float(lo), float(hi)]


def _kernel_candidates(name: str, opts) -> list[dict]:
    """Fixed non-width parameters to try for one kernel (explicit ones honoured)."""
    wanted = KERNEL_PARAMS[name]
    degrees = [opts.degree] if opts.degree is not None else [2.0, 3.0]
    if opts.coef0 is not None:
        coefs = [opts.coef0]
    else:  # polynomial: c₀ > 0 is a rescaling of γ and ridge (module notes); sigmoid: shifts
        coefs = [1.0] if name == "polynomial" else [0.0, 1.0]
    out = [{}]
    if "degree" in wanted:
        out = [dict(o, degree=float(d)) for o in out for d in degrees]
    if "coef0" in wanted:
        out = [dict(o, coef0=float(c)) for o in out for c in coefs]
    return out


def _refine_ridge(problem: Problem, curve: Curve) -> Curve:
    """Finer ridge grid between the best grid value's neighbours (one more decomposition)."""
    r = curve.ridges
    if r.size < 3:
        return curve
    b = curve.best
    lo, hi = r[max(b - 1, 0)], r[min(b + 1, r.size - 1)]
    fine = evaluate(problem, curve.spec, np.geomspace(lo, hi, 17))
    return fine if fine.best_score < curve.best_score else curve


def _standardized_problem(x_tr, y_tr, ridge_fixed, seed,
                          time_ordered: bool = False) -> tuple[Problem, dict]:
    n = x_tr.shape[0]
    x_s = Standardizer.fit(x_tr)(x_tr)
    y_c = y_tr - y_tr.mean(axis=0)
    var = y_c.var(axis=0)
    var[var <= 0] = 1.0
    info: dict = {"fallback": False}
    folds = None
    if time_ordered:
        if n > EXACT_MAX_ROWS:  # every k-th row keeps the time order and the whole span
            keep = np.unique(np.linspace(0, n - 1, FALLBACK_ROWS).round().astype(int))
            x_s, y_c = x_s[keep], y_c[keep] - y_c[keep].mean(axis=0)
            info["fallback"] = {
                "reason": f"{n} training rows > {EXACT_MAX_ROWS}: folds on every "
                          f"{n / keep.size:.1f}-th row in time order",
                "subsample_rows": int(keep.size), "folds": TIME_FOLDS,
            }
        folds = time_series_folds(x_s.shape[0])
        info["time_folds"] = {
            "folds": len(folds), "validation_rows": int(len(folds[0][1])),
            "gap_rows": int(folds[0][1][0] - folds[0][0][-1] - 1),
            "how": "forward-chaining contiguous blocks in time order (TimeSeriesSplit with gap)",
        }
    elif n > EXACT_MAX_ROWS:
        rng = np.random.default_rng(seed)
        keep = np.sort(rng.choice(n, size=FALLBACK_ROWS, replace=False))
        x_s, y_c = x_s[keep], y_c[keep] - y_c[keep].mean(axis=0)
        perm = rng.permutation(FALLBACK_ROWS)
        everything = np.arange(FALLBACK_ROWS)
        folds = [(np.setdiff1d(everything, f), np.sort(f))
                 for f in np.array_split(perm, FALLBACK_FOLDS)]
        info["fallback"] = {
            "reason": f"{n} training rows > {EXACT_MAX_ROWS}: exact LOO (n³ per candidate) "
                      "too slow",
            "subsample_rows": FALLBACK_ROWS,
            "folds": FALLBACK_FOLDS,
        }
    return Problem(x_s, y_c, 1.0 / var, ridge_fixed, folds), info


def tune(opts, x_tr: np.ndarray, y_tr: np.ndarray, log=print,
         time_ordered: bool = False) -> tuple[KernelSpec, float, dict]:
    """Choose the omitted kernel parameters and ridge on the training rows.

    Parameters
    ----------
    opts : ``trainer.train.TrainOptions``; explicit ``gamma``, ``degree``, ``coef0`` and
        ``ridge`` are used exactly, omitted ones are searched; ``kernel`` may be ``"auto"``.
    x_tr : (n, d) raw training features (standardized here, as the final fit does).
    y_tr : (n, t) training targets.
    log : one-line progress messages.
    time_ordered : rows are in time order: blocked cross-validation in time order
        (:func:`time_series_folds`) replaces leave-one-out, which is optimistic on an
        autocorrelated series (a row's neighbours in time are near-copies of it).

    Returns
    -------
    (spec, ridge, info) : the chosen kernel, the ridge and a JSON-ready account of the search.
    """
    t0 = time.perf_counter()
    n = x_tr.shape[0]
    if n < 3:
        raise UserError(f"{n} training rows are too few to tune; give --gamma and --ridge")
    if opts.ridge is not None and not opts.ridge > 0:
        raise UserError(f"ridge must be positive for tuning, got {opts.ridge}")
    kernels = list(AUTO_KERNELS) if opts.kernel == "auto" else [opts.kernel]
    problem, info = _standardized_problem(x_tr, y_tr, opts.ridge, opts.seed, time_ordered)
    m = problem.x_s.shape[0]
    widths_searched = opts.gamma is None
    per_kernel_fits = (WIDTH_GRID_SIZE + WIDTH_EXTENSIONS + 2 * WIDTH_BISECTIONS)
    hint = sum((per_kernel_fits if "gamma" in KERNEL_PARAMS[k] and widths_searched else 1)
               * len(_kernel_candidates(k, opts)) for k in kernels)
    runner = _make_runner(m, opts.quiet, hint, log)
    if time_ordered:
        tf = info["time_folds"]
        what = (f"blocked cross-validation in time order ({tf['folds']} forward-chaining folds "
                f"of {tf['validation_rows']} rows, gap {tf['gap_rows']} rows)")
    elif info["fallback"]:
        what = f"{FALLBACK_FOLDS}-fold cross-validation on a {FALLBACK_ROWS}-row subsample"
    else:
        what = "exact leave-one-out"
    if info["fallback"]:
        log(f"tuning: {info['fallback']['reason']}; falling back to {what}")
    log(f"tuning {', '.join(kernels)} by {what} on {m} rows; {runner.how}")

    curves: list[Curve] = []
    ranges: dict[str, list[float]] = {}
    for name in kernels:
        for base in _kernel_candidates(name, opts):
            if "gamma" in KERNEL_PARAMS[name] and widths_searched:
                got, ranges[name] = _search_widths(problem, base, name, runner, opts.seed)
            else:
                gamma = {"gamma": float(opts.gamma)} if "gamma" in KERNEL_PARAMS[name] else {}
                got = runner(problem, [KernelSpec(name, **gamma, **base)])
            curves += got
    runner.close()
    best = min(curves, key=lambda c: c.best_score)
    failures = [c for c in curves if c.failure]
    if failures:
        log(f"tuning: {len(failures)} of {len(curves)} candidates failed numerically "
            f"(first: {failures[0].spec.describe()}, {failures[0].failure})")
    if not math.isfinite(best.best_score):
        raise UserError(f"tuning found no usable parameters ({len(failures)} of {len(curves)} "
                        "candidates failed numerically, the rest were ill-conditioned at every "
                        "ridge); give --gamma and --ridge explicitly")
    if opts.ridge is None:
        best = _refine_ridge(problem, best)
    ridge = float(opts.ridge) if opts.ridge is not None else float(best.ridges[best.best])
    spec = best.spec
    chosen_rmse = [float(v) for v in best.rmse[best.best]]
    seconds = time.perf_counter() - t0

    per_kernel = {}
    for name in kernels:
        own = [c for c in curves if c.spec.name == name]
        b = min(own, key=lambda c: c.best_score)
        per_kernel[name] = {
            "params": b.spec.params(), "ridge": float(b.ridges[b.best]),
            "score": b.best_score if math.isfinite(b.best_score) else None,
            "loo_rmse": [float(v) for v in b.rmse[b.best]],
        }
    targets = y_tr.shape[1]
    cv = problem.folds is not None
    crit_txt = ("CV MSE" if cv else "LOO MSE") + (
        " / Var(target), averaged over the targets" if targets > 1 else "")
    searched = [p for p in ("gamma", "degree", "coef0")
                if any(p in KERNEL_PARAMS[k] for k in kernels) and getattr(opts, p) is None]
    searched += ["ridge"] if opts.ridge is None else []
    searched += ["kernel"] if opts.kernel == "auto" else []
    rmse_txt = ", ".join(f"{v:.4g}" for v in chosen_rmse)
    summary = (f"{spec.describe()}, ridge={ridge:.4g} chosen by {what} "
               f"({problem.evaluated} decompositions, {len(curves)} settings × ridge grid; "
               f"{'CV' if cv else 'LOO'} RMSE {rmse_txt}; {seconds:.1f} s)")
    info.update({
        "method": what + ("" if cv else
                          " (closed form from one eigendecomposition per kernel setting)"),
        "criterion": crit_txt,
        "searched": searched,
        "fixed": {p: float(getattr(opts, p)) for p in ("gamma", "degree", "coef0", "ridge")
                  if getattr(opts, p) is not None},
        "kernels": kernels,
        "grid": {
            "ridge": ("fixed" if opts.ridge is not None else
                      f"{RIDGE_GRID_SIZE} log-spaced values, {RIDGE_RELATIVE[0]:g} to "
                      f"{RIDGE_RELATIVE[1]:g} × mean diagonal of K, refined around the best"),
            "gamma": (None if not widths_searched else
                      f"{WIDTH_GRID_SIZE} log-spaced widths between 0.05/q90 of the pairwise "
                      f"distances and 3/median nearest-neighbour distance, up to "
                      f"{WIDTH_EXTENSIONS} edge extensions, {WIDTH_BISECTIONS} bisections"),
            "gamma_range": ranges,
        },
        "chosen": {"kernel": spec.name, "params": spec.params(), "ridge": ridge,
                   "score": best.best_score, "cv_rmse": chosen_rmse,
                   "ridge_at_grid_edge": bool(opts.ridge is None
                                              and best.ridges.size == RIDGE_GRID_SIZE
                                              and best.best in (0, best.ridges.size - 1))},
        "per_kernel": per_kernel,
        "curves": [c.as_json() for c in curves],
        "decompositions": problem.evaluated,
        "numerical_failures": len(failures),
        "parallel": runner.how,
        "seconds": round(seconds, 3),
        "summary": summary,
    })
    log(f"tuning: {summary}")
    return spec, ridge, info


# ---------------------------------------------------------------------------------------------
# prediction intervals

#: Nominal coverages reported on the holdout.
COVERAGE_LEVELS = (0.8, 0.9, 0.95)


def conformal_half_width(abs_residuals: np.ndarray, coverage: float) -> np.ndarray:
    """Split-conformal half-width per target from c calibration residuals |r|.

    The ⌈(c + 1)·coverage⌉-th smallest |r| (the finite-sample correction of split conformal
    prediction: Lei, G'Sell, Rinaldo, Tibshirani & Wasserman, JASA 2018); infinite when that
    rank exceeds c. Same rule as ``service.bundle.Model.half_width``.

    Parameters
    ----------
    abs_residuals : (c, t) absolute residuals, any order.
    coverage : nominal coverage in (0, 1).
    """
    if not 0 < coverage < 1:
        raise ValueError(f"coverage must be in (0, 1), got {coverage}")
    srt = np.sort(np.asarray(abs_residuals, dtype=np.float64), axis=0)
    c = srt.shape[0]
    rank = math.ceil((c + 1) * coverage)
    if rank > c:
        return np.full(srt.shape[1], np.inf)
    return srt[rank - 1]


def interval_coverage(abs_residuals: np.ndarray, actual: np.ndarray, predicted: np.ndarray,
                      levels=COVERAGE_LEVELS) -> list[dict]:
    """Empirical coverage of ``predicted ± half-width`` on (m, t) points, per nominal level."""
    out = []
    for level in levels:
        hw = conformal_half_width(abs_residuals, level)
        inside = np.abs(np.asarray(actual) - np.asarray(predicted)) <= hw[None, :]
        out.append({
            "nominal": float(level),
            "empirical": [float(v) for v in inside.mean(axis=0)],
            "half_width": [float(v) for v in hw],
            "rows": int(inside.shape[0]),
        })
    return out
