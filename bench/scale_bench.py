"""Large data: Nyström on a million rows from CSV against exact KRR on subsamples.

A synthetic process of our own is written to CSV: 8 inputs uniform on [−1, 1], a smooth
response with four two-input interactions (:func:`response`) and Gaussian noise of SD 0.1,
so no model can score a fresh-row RMSE below 0.1. `kridge train` fits it with the default
`--method auto` (Nyström above 15,000 rows) in a child process whose wall time and peak RSS
are measured. Exact KRR (`--method exact`, tuned the same way) is fitted on subsamples of
5,000, 10,000, 15,000 and 20,000 rows, stopping after the first that takes longer than the
Nyström fit: the largest exact fit within the same time is the fair comparison. Every model
is scored on 20,000 fresh rows, against the noisy target and against the noiseless response.

More data only helps where the response has structure a small sample cannot pin down. A
smoother response (one interaction, low frequencies) left exact KRR on 5,000 rows within
12 % of the noise floor, where no method can be 10 % better; this one has more structure,
and the bench prints the noise floor beside every figure so the headroom is visible.

    .venv/bin/python bench/scale_bench.py                  # 1e6 rows
    .venv/bin/python bench/scale_bench.py --rows 10000000 \
        --exact-rows                                                                 # 1e7 rows
    .venv/bin/python bench/scale_bench.py --exact-rows --cg-landmarks 10000 \
        --direct-too                                   # CG with 10,000 landmarks vs direct

With ``--cg-landmarks M`` the bench also fits Nyström with M landmarks by preconditioned CG
(``--solver cg``, stopped by the validation rule; which rule stopped each ridge is
printed), with ``--direct-too`` the direct solve at the same M, and scikit-learn's
``Nystroem`` + ``Ridge`` with M components and our kernel and ridge where its n × M feature
matrix fits in a quarter of the memory. Every figure is printed with the load average
before and after it: the machine is shared.

Printed: times, peak memory, held-out RMSE and their ratios, with the machine's cores and
BLAS kernel in the header. Data and store go to a temporary folder that is deleted at the
end (unless --keep names one).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from bench.machine import header, machine  # noqa: E402
from service.store import Store  # noqa: E402

KRIDGE = str(Path(sys.executable).with_name("kridge"))
NOISE = 0.1


def response(x: np.ndarray) -> np.ndarray:
    """The synthetic process (our own): four smooth two-input interactions, variance ≈ 0.78.

    f(x) = sin(3x₀ + 2x₁) + x₂x₃ + 0.6·cos(4x₄)·x₅ + 0.5·sin(4x₆x₇)
    """
    return (np.sin(3.0 * x[:, 0] + 2.0 * x[:, 1]) + x[:, 2] * x[:, 3]
            + 0.6 * np.cos(4.0 * x[:, 4]) * x[:, 5] + 0.5 * np.sin(4.0 * x[:, 6] * x[:, 7]))


def write_csv(path: Path, rows: int, seed: int, block: int = 1_000_000) -> None:
    """Write the CSV in blocks (a 10,000,000-row file never sits in memory)."""
    import pyarrow as pa
    import pyarrow.csv as pcsv

    rng = np.random.default_rng(seed)
    names = [f"x{i}" for i in range(8)] + ["y"]
    with pcsv.CSVWriter(path, pa.schema([(n, pa.float64()) for n in names])) as writer:
        for start in range(0, rows, block):
            m = min(block, rows - start)
            x = rng.uniform(-1.0, 1.0, (m, 8))
            y = response(x) + NOISE * rng.standard_normal(m)
            cols = {f"x{i}": x[:, i] for i in range(8)}
            cols["y"] = y
            writer.write_table(pa.table(cols))


def train(data: Path, store: Path, name: str, *extra: str) -> dict:
    """`kridge train` in a child process: its summary, wall seconds and peak RSS (MB).

    The child's own peak RSS comes from wait4's resource usage for that child alone.
    """
    argv = [KRIDGE, "train", str(data), "--target", "y", "--name", name, "--store",
            str(store), "--no-report", "--quiet", "--json", *extra]
    before = os.getloadavg()
    with tempfile.TemporaryFile() as out, tempfile.TemporaryFile() as err:
        t0 = time.perf_counter()
        child = subprocess.Popen(argv, stdout=out, stderr=err)
        _pid, status, usage = os.wait4(child.pid, 0)
        seconds = time.perf_counter() - t0
        child.returncode = os.waitstatus_to_exitcode(status)
        out.seek(0)
        err.seek(0)
        if child.returncode:
            raise SystemExit(f"kridge train failed: {err.read().decode()}")
        summary = json.loads(out.read())
    summary["wall_seconds"] = seconds
    summary["peak_rss_mb"] = usage.ru_maxrss / 1024  # Linux reports kilobytes
    # CPU seconds beside wall seconds: on a shared machine the ratio shows the contention
    summary["cpu_seconds"] = usage.ru_utime + usage.ru_stime
    summary["load"] = load_line(before)
    return summary


def load_line(before: tuple[float, ...]) -> str:
    """'load b → a': 1-minute load averages before and after a fit (cores: os.cpu_count())."""
    return f"load {before[0]:.1f} → {os.getloadavg()[0]:.1f}"


def sklearn_rows(m: int) -> int:
    """The most rows whose n × m float64 feature matrix fits in a quarter of the memory, and
    at most 50,000 (Ridge copies it and forms an m × m product beside it)."""
    memory = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    return min(50_000, int(memory / 4 / (m * 8)))


def sklearn_nystroem(table: np.ndarray, store: Path, name: str, m: int, x: np.ndarray,
                     y: np.ndarray) -> dict:
    """scikit-learn's Nystroem (m random components) + Ridge with the kernel and ridge our
    model ``name`` chose, on the same standardized rows (``table``: the file's columns, the
    8 inputs then y; at most :func:`sklearn_rows` of them)."""
    from sklearn.kernel_approximation import Nystroem
    from sklearn.linear_model import Ridge

    man = Store(store).read_manifest(name, 1)

    mean, scale = (np.array(man["standardization"][k]) for k in ("mean", "scale"))
    kern = man["kernel"]
    before = os.getloadavg()
    t0 = time.perf_counter()
    xs = (table[:, :8] - mean) / scale
    ny = Nystroem(kernel=kern["name"], gamma=kern["params"].get("gamma"), n_components=m,
                  random_state=0).fit(xs)
    reg = Ridge(alpha=man["ridge"]).fit(ny.transform(xs), table[:, 8])
    seconds = time.perf_counter() - t0
    pred = reg.predict(ny.transform((x - mean) / scale))
    return {"wall_seconds": seconds, "cpu_seconds": float("nan"), "peak_rss_mb": float("nan"),
            "fresh_rmse": float(np.sqrt(np.mean((pred - y) ** 2))),
            "f_rmse": float(np.sqrt(np.mean((pred - response(x)) ** 2))),
            "method": f"scikit-learn Nystroem({m}) + Ridge", "kernel": kern["name"],
            "ridge": man["ridge"], "load": load_line(before)}


def fresh_rmse(store: Path, name: str, x: np.ndarray, y: np.ndarray
               ) -> tuple[float, float]:
    """RMSE of the served model on fresh rows: against y, and against the noiseless f(x)."""
    sys.path.insert(0, str(ROOT))
    from service import load_model

    pred = load_model(store, name, 1).predict(x)
    return (float(np.sqrt(np.mean((pred - y) ** 2))),
            float(np.sqrt(np.mean((pred - response(x)) ** 2))))


def ny_default(results: list) -> dict:
    return results[0][2]


def direct_estimate(store: Path, name: str, table: np.ndarray, train_rows: int) -> str:
    """The direct solve's pass 2 at the CG model's m, timed on the rows ``table`` (the file's
    columns) with the model's landmarks and kernel, and scaled to ``train_rows`` (its cost is
    n·m² multiply-adds: linear in the rows); an estimate, said so."""
    from service.kernels import KernelSpec
    from trainer.nystrom.numerics import accumulate

    st = Store(store)
    man = st.read_manifest(name, 1)
    lm = st.load_arrays(name, 1, man)["x_train"]  # the landmarks, standardized
    mean, scale = (np.array(man["standardization"][k]) for k in ("mean", "scale"))
    rows = table.shape[0]
    xs, y = (table[:, :8] - mean) / scale, table[:, 8:9]
    kern = man["kernel"]
    spec = KernelSpec(kern["name"], **kern["params"])
    before = os.getloadavg()
    t0 = time.perf_counter()
    accumulate(spec, lm, xs, y)
    seconds = time.perf_counter() - t0
    m = lm.shape[0]
    total = seconds * train_rows / rows
    return (f"direct solve at m = {m}: pass 2 over {rows:,} rows took {seconds:.1f} s "
            f"({seconds / (rows * m * m) * 1e9:.3f} ns per row and m² element, "
            f"{load_line(before)}); for {train_rows:,} training rows an ESTIMATE of "
            f"{total:.0f} s ({total / 3600:.1f} h), not run, before its m × m "
            "eigendecompositions")


def cg_runs(args, data: Path, store: Path, x_test: np.ndarray, y_test: np.ndarray) -> list:
    """CG at --cg-landmarks, the direct solve at the same m (--direct-too, else its time
    estimated from a slice), scikit-learn where its feature matrix fits."""
    m = args.cg_landmarks
    out = []
    for solver in ("cg", "direct") if args.direct_too else ("cg",):
        name = f"{solver}-{m}"
        res = train(data, store, name, "--method", "nystrom", "--landmarks", str(m),
                    "--solver", solver)
        res["fresh_rmse"], res["f_rmse"] = fresh_rmse(store, name, x_test, y_test)
        out.append((f"nystrom {solver}, m = {m}", args.rows, res))
        train_rec = Store(store).read_manifest(name, 1)["training"]
        solve = {k: v for k, v in (train_rec.get("solve") or {}).items()
                 if k in ("iterations", "final_residual", "converged", "seconds",
                          "stopped_by", "column_iterations")}
        print(f"nystrom {solver} with {m} landmarks: {res['wall_seconds']:.0f} s "
              f"({res['load']}); fit {train_rec['fit_seconds']:.0f} s {solve}", flush=True)
    import pyarrow.csv as pcsv

    file = pcsv.read_csv(data)  # read once: the slices below and scikit-learn's rows
    if not args.direct_too:
        parts = Store(store).read_manifest(f"cg-{m}", 1)["training"]["parts"]
        print(direct_estimate(store, f"cg-{m}", file.slice(0, 20_000).to_pandas().to_numpy(),
                              parts["train"]), flush=True)
    fit_rows = sklearn_rows(m)
    if args.rows <= fit_rows:
        out.append((f"sklearn Nystroem+Ridge, m = {m}", args.rows, sklearn_nystroem(
            file.to_pandas().to_numpy(), store, f"cg-{m}", m, x_test, y_test)))
        return out
    print(f"scikit-learn Nystroem + Ridge on all rows skipped: its {args.rows} × {m} "
          f"feature matrix ({args.rows * m * 8 / 1e9:.0f} GB) exceeds a quarter of the "
          f"memory; fitted instead on the file's first {fit_rows:,} rows, beside kridge's "
          "CG on the same rows", flush=True)
    first = file.slice(0, fit_rows)
    sub = data.with_name(f"first_{fit_rows}.csv")
    pcsv.write_csv(first, sub)
    res = train(sub, store, f"cg-{m}-first", "--method", "nystrom", "--landmarks", str(m),
                "--solver", "cg")
    res["fresh_rmse"], res["f_rmse"] = fresh_rmse(store, f"cg-{m}-first", x_test, y_test)
    out.append((f"nystrom cg, m = {m}", fit_rows, res))
    out.append((f"sklearn Nystroem+Ridge, m = {m}", fit_rows, sklearn_nystroem(
        first.to_pandas().to_numpy(), store, f"cg-{m}-first", m, x_test, y_test)))
    return out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--exact-rows", type=int, nargs="*",
                    default=[5_000, 10_000, 15_000, 20_000],
                    help="exact subsamples, smallest first; the run stops after the first "
                         "that takes longer than the Nyström fit")
    ap.add_argument("--landmarks", type=int, nargs="*", default=[],
                    help="also fit Nyström with these landmark counts (the default m first)")
    ap.add_argument("--cg-landmarks", type=int, metavar="M",
                    help="also fit M landmarks by preconditioned CG (--solver cg)")
    ap.add_argument("--direct-too", action="store_true",
                    help="with --cg-landmarks: the direct solve at the same M as well")
    ap.add_argument("--keep", help="folder to keep the data and store in")
    args = ap.parse_args()
    work = Path(args.keep or tempfile.mkdtemp(prefix="kridge-scale-"))
    work.mkdir(parents=True, exist_ok=True)
    try:
        return run(args, work)
    finally:
        if not args.keep:
            shutil.rmtree(work, ignore_errors=True)


def run(args, work: Path) -> int:
    print(header("scale bench: Nyström on a large file vs exact KRR on subsamples"))
    print(f"# response: {response.__doc__.splitlines()[2].strip()}, x ~ U[-1, 1]^8; "
          f"noise SD {NOISE} (the lowest possible fresh RMSE)")
    data = work / f"process_{args.rows}.csv"
    if not data.exists():
        t0 = time.perf_counter()
        write_csv(data, args.rows, seed=1)
        print(f"wrote {data.name}: {args.rows} rows, {data.stat().st_size / 1e6:.0f} MB "
              f"in {time.perf_counter() - t0:.0f} s", flush=True)
    rng = np.random.default_rng(2)
    x_test = rng.uniform(-1.0, 1.0, (20_000, 8))
    y_test = response(x_test) + NOISE * rng.standard_normal(20_000)
    store = work / "store"
    results = []
    big = train(data, store, "nystrom", "--method", "nystrom")
    big["fresh_rmse"], big["f_rmse"] = fresh_rmse(store, "nystrom", x_test, y_test)
    results.append(("nystrom", args.rows, big))
    print(f"nystrom: {big['wall_seconds']:.0f} s ({big['cpu_seconds']:.0f} CPU s), "
          f"{big['method']}", flush=True)
    others = []
    for m in args.landmarks:
        res = train(data, store, f"nystrom-{m}", "--method", "nystrom", "--landmarks", str(m))
        res["fresh_rmse"], res["f_rmse"] = fresh_rmse(store, f"nystrom-{m}", x_test, y_test)
        others.append((f"nystrom, m = {m}", args.rows, res))
        print(f"nystrom with {m} landmarks: {res['wall_seconds']:.0f} s", flush=True)
    if args.cg_landmarks:
        others += cg_runs(args, data, store, x_test, y_test)
    for n in sorted(args.exact_rows):
        sub = work / f"process_sub_{n}.csv"
        write_csv(sub, n, seed=3 + n)
        res = train(sub, store, f"exact-{n}", "--method", "exact")
        res["fresh_rmse"], res["f_rmse"] = fresh_rmse(store, f"exact-{n}", x_test, y_test)
        results.append(("exact KRR, subsample", n, res))
        print(f"exact on {n}: {res['wall_seconds']:.0f} s ({res['cpu_seconds']:.0f} CPU s)",
              flush=True)
        if res["wall_seconds"] > big["wall_seconds"]:
            break
    print(f"\n{'fit':<30}{'rows':>11}{'wall s':>8}{'CPU s':>8}{'peak RSS MB':>13}"
          f"{'fresh RMSE':>12}{'/ noise':>9}{'RMSE vs f':>11}  load")
    for label, n, r in results + others:
        print(f"{label:<30}{n:>11,}{r['wall_seconds']:>8.1f}{r['cpu_seconds']:>8.1f}"
              f"{r['peak_rss_mb']:>13.0f}"
              f"{r['fresh_rmse']:>12.4f}{r['fresh_rmse'] / NOISE:>9.3f}{r['f_rmse']:>11.4f}"
              f"  {r['load']}")
    for label, _n, r in others:
        if "cg" in label:
            print(f"{label}: {r['method']}; ridge {r['ridge']:.4g}; fresh RMSE / default "
                  f"Nyström's {r['fresh_rmse'] / ny_default(results)['fresh_rmse']:.3f}")
    ny = results[0][2]
    print(f"\nnystrom: {ny['method']}; kernel {ny['kernel']}, ridge {ny['ridge']:.4g}")
    within = [(n, r) for _lab, n, r in results[1:] if r["wall_seconds"] <= ny["wall_seconds"]]
    for _label, n, r in results[1:]:
        gain = 1 - ny["fresh_rmse"] / r["fresh_rmse"]
        print(f"nystrom vs exact on {n:,} rows: fresh RMSE ratio "
              f"{ny['fresh_rmse'] / r['fresh_rmse']:.3f} ({gain:.1%} better), RMSE-vs-f ratio "
              f"{ny['f_rmse'] / r['f_rmse']:.3f}, time ratio "
              f"{ny['wall_seconds'] / r['wall_seconds']:.2f}")
    if within:
        print(f"largest exact subsample fitted within the Nyström time: {within[-1][0]:,} rows")
    out = ROOT / "bench" / "results"
    out.mkdir(exist_ok=True)
    (out / f"scale_bench_{args.rows}.json").write_text(json.dumps(
        {"machine": machine(), "rows": args.rows, "noise_sd": NOISE,
         "results": [{"fit": lab, "rows": n, **{k: r[k] for k in (
             "wall_seconds", "cpu_seconds", "peak_rss_mb", "fresh_rmse", "f_rmse", "method",
             "kernel", "ridge", "load")}} for lab, n, r in results + others]}, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
