"""Prediction engine against scikit-learn's KernelRidge.predict and against the machine's floor.

Run: ``.venv/bin/python bench/engine_bench.py [--quick]``

Reference: scikit-learn 1.9 ``sklearn.kernel_ridge.KernelRidge.predict``, given the very same
numbers (``X_fit_`` and ``dual_coef_`` set directly, kernel parameters copied), so both sides
compute k(Q, X)·α for an identical model.

Method. For each kernel and batch size the two sides run in alternating blocks; a block is
enough back-to-back calls to last ~50 ms and gives a per-call time; the best block of each side
counts. A pause precedes every block because BLAS worker threads keep spinning about 0.1 s after
a call and would slow whatever runs next. The floor is measured in the same run: the same
number of elementwise evaluations of the kernel's final function (exp, or the cube for the
polynomial) done in place on one cache-sized block, plus the matrix products Q·Xᵀ and K·α over
cache-sized tiles, on as many threads as the engine uses for that batch. Peak memory is the
tracemalloc peak of one call (numpy reports its buffers to tracemalloc).

Targets: rbf ≥ 10× scikit-learn at 1 row and ≥ 4× at 1,000 rows; within 2× of
the floor at 1,000 rows. The machine is shared, so ratios move between runs.
"""

from __future__ import annotations

import argparse
import sys
import time
import tracemalloc
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
from threadpoolctl import threadpool_limits

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from service.engine import PARALLEL_MIN_ROWS, TILE_ELEMENTS, Engine  # noqa: E402
from service.kernels import default_spec  # noqa: E402

N_TRAIN = 20_000
N_FEATURES = 16
KERNELS = ("rbf", "laplacian", "polynomial")
BATCHES = (1, 10, 1_000, 10_000)
PAUSE_S = 0.15
BLOCK_S = 0.05
#: scikit-learn's laplacian builds the full L1 distance matrix with scipy's cdist: at
#: 10,000 × 20,000 that is 1.6 GB and tens of seconds per repeat, so it is left out.
SKIP_SKLEARN = {("laplacian", 10_000)}


def repeats_for(m: int, quick: bool) -> int:
    """Best-of-N: fewer repeats where one call already takes a second."""
    if m >= 10_000:
        return 2
    return 3 if quick else (5 if m >= 1_000 else 9)


def timed_block(fn, calls: int) -> float:
    """Per-call seconds over ``calls`` back-to-back calls, after a pause."""
    time.sleep(PAUSE_S)
    t0 = time.perf_counter()
    for _ in range(calls):
        fn()
    return (time.perf_counter() - t0) / calls


def calls_per_block(fn) -> int:
    t0 = time.perf_counter()
    fn()
    once = time.perf_counter() - t0
    return max(1, int(BLOCK_S / max(once, 1e-7)))


def peak_mb(fn) -> float:
    """tracemalloc peak (MB) of one call."""
    tracemalloc.start()
    tracemalloc.reset_peak()
    fn()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return peak / 1e6


def floor_fn(kernel: str, q: np.ndarray, x: np.ndarray, alpha: np.ndarray, threads: int):
    """The unavoidable work for a batch, tiled like the engine, on ``threads`` threads.

    m·n evaluations of the final elementwise function on one cache-sized block, plus Q·Xᵀ
    and K·α over cache-sized tiles. For the laplacian this leaves out the d per-feature
    passes of the L1 distance, which no matrix product can do.
    """
    m, n = q.shape[0], x.shape[0]
    rows = min(m, 128)
    cols = min(n, max(1, TILE_ELEMENTS // rows))
    xt = x.T

    def part(lo: int, hi: int) -> None:
        block = np.full(rows * cols, -0.5)
        tile = np.empty((rows, cols))
        acc = np.empty((rows, alpha.shape[1]))
        for i in range(lo, hi, rows):
            qi = q[i : min(i + rows, hi)]
            r = qi.shape[0]
            for j in range(0, n, cols):
                w = min(cols, n - j)
                t = tile[:r, :w]
                np.matmul(qi, xt[:, j : j + w], out=t)
                b = block[: r * w]
                if kernel == "polynomial":
                    np.multiply(b, b, out=b)  # the cube's two multiplies
                    np.multiply(b, b, out=b)
                    b.fill(-0.5)  # keep the values finite; a cheap pass, counted here too
                else:
                    np.exp(b, out=b)
                    b.fill(-0.5)
                np.matmul(t, alpha[j : j + w], out=acc[:r])

    if threads == 1:
        return lambda: part(0, m)
    pool = ThreadPoolExecutor(threads)
    step = -(-m // threads)

    def run() -> None:
        list(pool.map(lambda s: part(s, min(s + step, m)), range(0, m, step)))

    return run


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer repeats")
    parser.add_argument("--kernels", default=",".join(KERNELS))
    parser.add_argument("--batches", default=",".join(map(str, BATCHES)))
    args = parser.parse_args()

    from sklearn import __version__ as sk_version
    from sklearn.kernel_ridge import KernelRidge

    rng = np.random.default_rng(5)
    x = rng.standard_normal((N_TRAIN, N_FEATURES))
    alpha = rng.standard_normal((N_TRAIN, 1))
    print(
        f"n = {N_TRAIN:,} training rows, d = {N_FEATURES}; scikit-learn {sk_version}, "
        f"numpy {np.__version__}; pause {PAUSE_S} s before each block, best of N blocks"
    )
    header = (
        f"{'kernel':<11}{'batch':>7}{'ours':>12}{'sklearn':>12}{'floor':>12}"
        f"{'×sklearn':>10}{'×floor':>8}{'ours MB':>9}{'sk MB':>9}{'rel err':>10}"
    )
    print(header)
    print("-" * len(header))
    results = {}
    for kernel in args.kernels.split(","):
        spec = default_spec(kernel, N_FEATURES)
        engine = Engine(spec, x, alpha)
        ref = KernelRidge(kernel=kernel, **spec.params())
        ref.X_fit_ = x
        ref.dual_coef_ = alpha
        for m in map(int, args.batches.split(",")):
            q = rng.standard_normal((m, N_FEATURES))
            threads = 1 if m < PARALLEL_MIN_ROWS else engine.threads
            ours = lambda q=q, e=engine: e.predict(q)
            skl = lambda q=q, r=ref: r.predict(q)
            with threadpool_limits(1, user_api="blas"):
                floor = floor_fn(kernel, q, x, alpha, threads)
                floor()
            use_sk = (kernel, m) not in SKIP_SKLEARN
            err = np.nan
            if use_sk:
                got, want = ours(), skl()
                err = float(np.max(np.abs(got - want)) / np.max(np.abs(want)))
            n_ours = calls_per_block(ours)
            n_sk = calls_per_block(skl) if use_sk else 0
            n_floor = calls_per_block(floor)
            t_ours, t_sk, t_floor = [], [], []
            for _ in range(repeats_for(m, args.quick)):
                t_ours.append(timed_block(ours, n_ours))
                if use_sk:
                    t_sk.append(timed_block(skl, n_sk))
                with threadpool_limits(1, user_api="blas"):
                    t_floor.append(timed_block(floor, n_floor))
            best_o, best_f = min(t_ours), min(t_floor)
            best_s = min(t_sk) if use_sk else np.nan
            mb_o = peak_mb(ours)
            mb_s = peak_mb(skl) if use_sk else np.nan
            results[(kernel, m)] = (best_o, best_s, best_f)
            print(
                f"{kernel:<11}{m:>7,}{fmt(best_o):>12}{fmt(best_s):>12}{fmt(best_f):>12}"
                f"{best_s / best_o:>9.1f}×{best_o / best_f:>7.2f}×{mb_o:>9.1f}{mb_s:>9.1f}"
                f"{err:>10.1e}",
                flush=True,
            )
    for kernel, m in sorted(SKIP_SKLEARN):
        print(f"note: scikit-learn skipped for {kernel} at {m:,} rows (1.6 GB matrix, slow)")
    print("note: laplacian floor omits the d per-feature L1 passes (no matrix-product form)")
    print(
        "×sklearn = sklearn time / ours (higher is better); ×floor = ours / floor "
        "(1.0 is the floor)"
    )
    check(results)
    return 0


def fmt(seconds: float) -> str:
    if not np.isfinite(seconds):
        return "–"
    if seconds < 1e-3:
        return f"{seconds * 1e6:.0f} µs"
    if seconds < 1:
        return f"{seconds * 1e3:.2f} ms"
    return f"{seconds:.2f} s"


def check(results: dict) -> None:
    """Print each target with its measured value."""
    targets = [
        ("rbf, 1 row: ≥ 10× scikit-learn", ("rbf", 1), lambda o, s, f: s / o, 10.0, True),
        ("rbf, 1,000 rows: ≥ 4× scikit-learn", ("rbf", 1000), lambda o, s, f: s / o, 4.0, True),
        ("rbf, 1,000 rows: ≤ 2× floor", ("rbf", 1000), lambda o, s, f: o / f, 2.0, False),
    ]
    for label, key, value, bound, higher in targets:
        if key not in results:
            continue
        v = value(*results[key])
        ok = v >= bound if higher else v <= bound
        print(f"target {label}: {v:.2f} {'met' if ok else 'NOT met'}")


if __name__ == "__main__":
    raise SystemExit(main())
