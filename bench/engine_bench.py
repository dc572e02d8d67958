"""Prediction speed against scikit-learn and against the machine's floor, in one run.

Run: ``.venv/bin/python bench/engine_bench.py [--quick] [--json FILE]``

Two tables, every figure a ratio of times measured side by side in this run:

1. Row path — ``load_model(...).predict`` on raw rows (checks, standardization, kernel sum,
   intercept) at n = 12,000 and 20,000 training rows, d = 16, for 1 and 10 rows, against
   * the floor: the least any implementation must do for the same answer, in bare numpy on
     buffers allocated once, BLAS on one thread, rows already standardized: per cache-sized
     column tile (all of X for one row) one product of the rows with Xᵀ, the kernel's
     elementwise function (exp; or the cube's two multiplies) in place, one product with α
     (ratio ours / floor; target ≤ 1.25);
   * scikit-learn ``KernelRidge.predict`` on the same standardized rows plus the intercept
     (ratio scikit-learn / ours).
2. Kernels — the engine at n = 20,000 for every kernel family at 1, 10 and 1,000 rows against
   scikit-learn: ``KernelRidge.predict`` (laplacian: its L1 distances come from scipy's
   ``cdist``), and for Matérn ``sklearn.gaussian_process.kernels.Matern`` (k(Q, X)·α).
   Targets: rbf ≥ 10× at 1 row and ≥ 4× at 1,000 rows, within 2× of the tiled floor at
   1,000 rows; laplacian and Matérn ≥ 2× at 1, 10 and 1,000 rows.

Reference: scikit-learn (version in the header) given the very same numbers (``X_fit_`` and
``dual_coef_`` set directly, kernel parameters copied).

Method. Sides run in alternating rounds of back-to-back calls (~20 ms per side and round,
after a short pause), each call timed on its own; each side's fastest call counts. The
machines are shared by several people: the fastest call is the one no other process
interrupted, which every side gets the same chances at.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
from threadpoolctl import threadpool_limits

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from bench.machine import add_json_option, header, save  # noqa: E402
from service import load_model  # noqa: E402
from service.engine import PARALLEL_MIN_ROWS, TILE_ELEMENTS, Engine  # noqa: E402
from service.kernels import default_spec  # noqa: E402
from service.store import Store  # noqa: E402

N_FEATURES = 16
ROW_SIZES = (12_000, 20_000)
ROW_KERNELS = ("rbf", "polynomial")
ROW_BATCHES = (1, 10)
N_TRAIN = 20_000
KERNELS = ("rbf", "polynomial", "laplacian", "matern32", "matern52")
BATCHES = (1, 10, 1_000)
PAUSE_S = 0.02
BLOCK_S = 0.02


# -- timing ----------------------------------------------------------------------------------
def best_of(sides: dict, rounds: int, limit_blas=frozenset()) -> dict[str, float]:
    """Fastest single call of each side, over ``rounds`` alternating rounds.

    A round gives each side ~``BLOCK_S`` of back-to-back calls, each timed on its own, after
    a short pause. On a shared machine the fastest call is the one no other process
    interrupted, so the minimum is the comparable figure for every side alike.
    """
    calls = {}
    for k, fn in sides.items():
        fn()
        once = np.inf
        for _ in range(5):
            t0 = time.perf_counter()
            fn()
            once = min(once, time.perf_counter() - t0)
        calls[k] = max(1, int(BLOCK_S / once))
    best = dict.fromkeys(sides, np.inf)
    clock = time.perf_counter
    for _ in range(rounds):
        for k, fn in sides.items():
            time.sleep(PAUSE_S)
            with threadpool_limits(1, user_api="blas") if k in limit_blas else _nothing():
                low = best[k]
                for _ in range(calls[k]):
                    t0 = clock()
                    fn()
                    low = min(low, clock() - t0)
                best[k] = low
    return best


class _nothing:
    def __enter__(self):
        return None

    def __exit__(self, *exc):
        return None


def fmt(seconds: float) -> str:
    if not np.isfinite(seconds):
        return "–"
    if seconds < 1e-3:
        return f"{seconds * 1e6:.1f} µs"
    if seconds < 1:
        return f"{seconds * 1e3:.2f} ms"
    return f"{seconds:.2f} s"


# -- the model behind load_model --------------------------------------------------------------
def publish(store: Store, kernel: str, n: int, rng: np.random.Generator) -> tuple[str, dict]:
    """A bundle with n random training rows (what a fit would store), released; returns its
    name and the arrays the references use."""
    spec = default_spec(kernel, N_FEATURES)
    x_s = rng.standard_normal((n, N_FEATURES))
    dual = rng.standard_normal((n, 1)) / n
    mean, scale = rng.uniform(-5, 5, N_FEATURES), rng.uniform(0.5, 3, N_FEATURES)
    feats = [f"f{j}" for j in range(N_FEATURES)]
    reference = x_s[np.sort(rng.choice(n, min(n, 2000), replace=False))]
    manifest = {
        "features": feats, "targets": ["y"], "intercept": [3.0],
        "standardization": {"mean": mean.tolist(), "scale": scale.tolist()},
        "kernel": {"name": kernel, "params": spec.params()}, "precision": "float64",
        "envelope": {"ranges": {f: {"min": float(mean[j] - 3 * scale[j]),
                                    "max": float(mean[j] + 3 * scale[j])}
                                for j, f in enumerate(feats)},
                     "novelty": {"k": 5, "threshold_distance": 4.0}},
    }
    name = f"{kernel}-{n}"
    version = store.publish(name, manifest, {"x_train": x_s, "dual": dual,
                                             "novelty_reference": reference})
    store.release(name, version)
    return name, {"spec": spec, "x_s": x_s, "dual": dual, "mean": mean, "scale": scale}


def row_floor(kernel: str, q_s: np.ndarray, x_s: np.ndarray, dual: np.ndarray):
    """Per cache-sized column tile: one product with Xᵀ, the elementwise function in place,
    one product with α accumulated; buffers allocated once."""
    m, n = q_s.shape[0], x_s.shape[0]
    cols = min(n, max(1, TILE_ELEMENTS // m))
    xt = x_s.T
    tile = np.empty((m, cols))
    scratch = np.empty_like(tile)
    out = np.empty((m, dual.shape[1]))
    acc = np.empty_like(out)

    def run() -> None:
        for j in range(0, n, cols):
            w = min(cols, n - j)
            t = tile[:, :w]
            np.matmul(q_s, xt[:, j : j + w], out=t)
            if kernel == "polynomial":
                s = scratch[:, :w]
                np.multiply(t, t, out=s)
                np.multiply(t, s, out=t)
            else:
                np.exp(t, out=t)
            if j == 0:
                np.matmul(t, dual[:w], out=out)
            else:
                np.matmul(t, dual[j : j + w], out=acc)
                np.add(out, acc, out=out)

    return run


def sklearn_model(spec, x_s, dual):
    from sklearn.kernel_ridge import KernelRidge

    if spec.name.startswith("matern"):
        from sklearn.gaussian_process.kernels import Matern

        kern = Matern(length_scale=1.0 / np.sqrt(2.0 * spec.gamma),
                      nu=1.5 if spec.name == "matern32" else 2.5)

        class _MaternRidge:
            def predict(self, q):
                return kern(q, x_s) @ dual

        return _MaternRidge()
    ref = KernelRidge(kernel=spec.name, **spec.params())
    ref.X_fit_, ref.dual_coef_ = x_s, dual
    return ref


def row_table(args, rng) -> list[dict]:
    print("\n1. row path: load_model(...).predict of raw rows; floor = one product with Xᵀ, "
          "elementwise, one product with α (numpy, BLAS 1 thread)")
    head = (f"{'kernel':<11}{'n':>7}{'rows':>5}{'ours':>11}{'floor':>11}{'sklearn':>11}"
            f"{'ours/floor':>11}{'sk/ours':>9}{'rel err':>10}")
    print(head)
    print("-" * len(head))
    rows = []
    with tempfile.TemporaryDirectory(prefix="kridge-engine-bench-") as tmp:
        store = Store(tmp)
        for kernel in args.row_kernels:
            for n in args.row_sizes:
                name, ref = publish(store, kernel, n, rng)
                model = load_model(store, name)
                sk = sklearn_model(ref["spec"], ref["x_s"], ref["dual"])
                for m in ROW_BATCHES:
                    x = ref["mean"] + ref["scale"] * rng.standard_normal((m, N_FEATURES))
                    q_s = (x - ref["mean"]) / ref["scale"]
                    want = sk.predict(q_s).reshape(m) + 3.0
                    got = model.predict(x)
                    err = float(np.max(np.abs(got - want)) / np.max(np.abs(want)))
                    best = best_of(
                        {"ours": lambda x=x, model=model: model.predict(x),
                         "floor": row_floor(kernel, q_s, ref["x_s"], ref["dual"]),
                         "sklearn": lambda q_s=q_s, sk=sk: sk.predict(q_s) + 3.0},
                        args.row_blocks, limit_blas={"floor"})
                    r = {"kernel": kernel, "n": n, "rows": m, **{f"{k}_s": v for k, v in
                                                                  best.items()},
                         "ratio_ours_to_floor": best["ours"] / best["floor"],
                         "ratio_sklearn_to_ours": best["sklearn"] / best["ours"],
                         "rel_err": err}
                    rows.append(r)
                    print(f"{kernel:<11}{n:>7,}{m:>5}{fmt(best['ours']):>11}"
                          f"{fmt(best['floor']):>11}{fmt(best['sklearn']):>11}"
                          f"{r['ratio_ours_to_floor']:>10.2f}×{r['ratio_sklearn_to_ours']:>8.1f}×"
                          f"{err:>10.1e}", flush=True)
    worst = max(r["ratio_ours_to_floor"] for r in rows)
    print(f"target: row path ≤ 1.25× floor at every size above: worst {worst:.2f}× "
          f"({'met' if worst <= 1.25 else 'NOT met'})")
    return rows


# -- kernels against scikit-learn ------------------------------------------------------------
def tiled_floor(kernel: str, q: np.ndarray, x: np.ndarray, alpha: np.ndarray, threads: int):
    """The unavoidable work for a batch, tiled like the engine, on ``threads`` threads: m·n
    evaluations of exp (or the cube) on one cache-sized block plus Q·Xᵀ and K·α."""
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
                    np.multiply(b, b, out=b)
                    np.multiply(b, b, out=b)
                else:
                    np.exp(b, out=b)
                b.fill(-0.5)
                np.matmul(t, alpha[j : j + w], out=acc[:r])

    if threads == 1:
        return lambda: part(0, m)
    pool = ThreadPoolExecutor(threads)
    step = -(-m // threads)
    return lambda: list(pool.map(lambda s: part(s, min(s + step, m)), range(0, m, step)))


def kernel_table(args, rng) -> list[dict]:
    print(f"\n2. kernels: engine vs scikit-learn, n = {N_TRAIN:,}, d = {N_FEATURES}")
    head = (f"{'kernel':<11}{'rows':>7}{'ours':>11}{'sklearn':>11}{'floor':>11}"
            f"{'sk/ours':>9}{'ours/floor':>11}{'rel err':>10}")
    print(head)
    print("-" * len(head))
    x = rng.standard_normal((N_TRAIN, N_FEATURES))
    alpha = rng.standard_normal((N_TRAIN, 1))
    rows = []
    for kernel in args.kernels:
        spec = default_spec(kernel, N_FEATURES)
        engine = Engine(spec, x, alpha)
        sk = sklearn_model(spec, x, alpha)
        for m in args.batches:
            q = rng.standard_normal((m, N_FEATURES))
            sides = {"ours": lambda q=q, e=engine: e.predict(q),
                     "sklearn": lambda q=q, sk=sk: sk.predict(q)}
            if kernel in ("rbf", "polynomial"):
                threads = 1 if m < PARALLEL_MIN_ROWS else engine.threads
                sides["floor"] = tiled_floor(kernel, q, x, alpha, threads)
            got, want = engine.predict(q), sk.predict(q).reshape(m, -1)
            err = float(np.max(np.abs(got - want)) / np.max(np.abs(want)))
            blocks = args.blocks if m < 1_000 else max(3, args.blocks // 4)
            best = best_of(sides, blocks, limit_blas={"floor"})
            fl = best.get("floor", np.nan)
            r = {"kernel": kernel, "rows": m, **{f"{k}_s": v for k, v in best.items()},
                 "ratio_sklearn_to_ours": best["sklearn"] / best["ours"],
                 "ratio_ours_to_floor": best["ours"] / fl, "rel_err": err}
            rows.append(r)
            print(f"{kernel:<11}{m:>7,}{fmt(best['ours']):>11}{fmt(best['sklearn']):>11}"
                  f"{fmt(fl):>11}{r['ratio_sklearn_to_ours']:>8.1f}×"
                  f"{r['ratio_ours_to_floor']:>10.2f}×{err:>10.1e}", flush=True)
    print("sk/ours = scikit-learn time / ours (higher is better); ours/floor: 1.0 is the floor")
    check(rows)
    return rows


def check(rows: list[dict]) -> None:
    """Print each target with its measured value."""
    got = {(r["kernel"], r["rows"]): r for r in rows}
    targets = [("rbf", 1, "ratio_sklearn_to_ours", 10.0, True),
               ("rbf", 1000, "ratio_sklearn_to_ours", 4.0, True),
               ("rbf", 1000, "ratio_ours_to_floor", 2.0, False)]
    targets += [(k, m, "ratio_sklearn_to_ours", 2.0, True)
                for k in ("laplacian", "matern32", "matern52") for m in (1, 10, 1000)]
    for kernel, m, key, bound, higher in targets:
        if (kernel, m) not in got:
            continue
        v = got[(kernel, m)][key]
        ok = v >= bound if higher else v <= bound
        what = "scikit-learn / ours" if key == "ratio_sklearn_to_ours" else "ours / floor"
        print(f"target {kernel}, {m:,} rows: {what} {'≥' if higher else '≤'} {bound:g}: "
              f"{v:.2f} {'met' if ok else 'NOT met'}")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer blocks")
    parser.add_argument("--kernels", default=",".join(KERNELS))
    parser.add_argument("--batches", default=",".join(map(str, BATCHES)))
    parser.add_argument("--row-kernels", default=",".join(ROW_KERNELS))
    parser.add_argument("--row-sizes", default=",".join(map(str, ROW_SIZES)))
    parser.add_argument("--only", choices=("rows", "kernels"), help="run one table")
    add_json_option(parser)
    args = parser.parse_args()
    args.kernels = args.kernels.split(",")
    args.batches = [int(b) for b in args.batches.split(",")]
    args.row_kernels = args.row_kernels.split(",")
    args.row_sizes = [int(n) for n in args.row_sizes.split(",")]
    args.blocks = 8 if args.quick else 20
    args.row_blocks = 15 if args.quick else 40

    from sklearn import __version__ as sk_version

    print(header("engine bench: kridge prediction vs scikit-learn and the numpy floor"))
    print(f"# scikit-learn {sk_version}; fastest call of alternating {BLOCK_S * 1e3:.0f} ms "
          "rounds per side")
    rng = np.random.default_rng(5)
    figures: dict = {"scikit_learn": sk_version}
    if args.only in (None, "rows"):
        figures["row_path"] = row_table(args, rng)
    if args.only in (None, "kernels"):
        figures["kernels"] = kernel_table(args, rng)
    save(args.json, "engine", figures)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
