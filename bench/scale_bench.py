"""Large data: Nyström on a million rows from CSV against exact KRR on subsamples.

A synthetic process of our own (8 inputs, a smooth nonlinear response, Gaussian noise of SD
0.1) is written to CSV; `kridge train` fits it with the default `--method auto` (Nyström
above 15,000 rows) in a child process whose wall time and peak RSS are measured. Exact KRR
(`--method exact`, tuned the same way) is fitted on a 5,000-row subsample and on the largest
subsample that fits in about the same time. Every model is scored on 20,000 fresh rows.

    .venv/bin/python bench/scale_bench.py                 # 1,000,000 rows
    .venv/bin/python bench/scale_bench.py --rows 10000000 # streamed, about half an hour

Printed: times, peak memory, held-out RMSE and their ratios, with the machine's cores and
BLAS in the header.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from bench.machine import header, machine  # noqa: E402

KRIDGE = str(Path(sys.executable).with_name("kridge"))
NOISE = 0.1


def response(x: np.ndarray) -> np.ndarray:
    """The synthetic process (our own): interactions, periodic and quadratic parts."""
    return (np.sin(2.0 * x[:, 0]) + x[:, 1] * x[:, 2] + 0.5 * np.cos(3.0 * x[:, 3])
            + 0.3 * x[:, 4] ** 2 + 0.4 * np.sin(3.0 * x[:, 5] * x[:, 6]) + 0.2 * x[:, 7])


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
    """`kridge train` in a child process: its summary, wall seconds, peak RSS (MB)."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    t0 = time.perf_counter()
    out = subprocess.run([KRIDGE, "train", str(data), "--target", "y", "--name", name,
                          "--store", str(store), "--no-report", "--quiet", "--json", *extra],
                         capture_output=True, text=True, check=False)
    seconds = time.perf_counter() - t0
    if out.returncode:
        raise SystemExit(f"kridge train failed: {out.stderr}")
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    summary = json.loads(out.stdout)
    summary["wall_seconds"] = seconds
    # ru_maxrss of children is the largest child so far: report it only when it grew
    summary["peak_rss_mb"] = peak / 1024 if peak > before else float("nan")
    return summary


def fresh_rmse(store: Path, name: str, x: np.ndarray, y: np.ndarray) -> float:
    sys.path.insert(0, str(ROOT))
    from service import load_model

    pred = load_model(store, name, 1).predict(x)
    return float(np.sqrt(np.mean((pred - y) ** 2)))


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--exact-rows", type=int, nargs="*", default=[5_000, 12_000])
    ap.add_argument("--keep", help="folder to keep the data and store in")
    args = ap.parse_args()
    print(header('scale bench: Nyström on a large file vs exact KRR on subsamples'))
    work = Path(args.keep or tempfile.mkdtemp(prefix="kridge-scale-"))
    work.mkdir(parents=True, exist_ok=True)
    data = work / f"process_{args.rows}.csv"
    if not data.exists():
        t0 = time.perf_counter()
        write_csv(data, args.rows, seed=1)
        print(f"wrote {data.name}: {args.rows} rows, {data.stat().st_size / 1e6:.0f} MB "
              f"in {time.perf_counter() - t0:.0f} s")
    rng = np.random.default_rng(2)
    x_test = rng.uniform(-1.0, 1.0, (20_000, 8))
    y_test = response(x_test) + NOISE * rng.standard_normal(20_000)
    store = work / "store"
    results = []
    big = train(data, store, "nystrom")
    big["fresh_rmse"] = fresh_rmse(store, "nystrom", x_test, y_test)
    results.append(("nystrom", args.rows, big))
    for n in args.exact_rows:
        sub = work / f"process_sub_{n}.csv"
        write_csv(sub, n, seed=3 + n)
        res = train(sub, store, f"exact-{n}", "--method", "exact")
        res["fresh_rmse"] = fresh_rmse(store, f"exact-{n}", x_test, y_test)
        results.append(("exact KRR, subsample", n, res))
    print(f"\n{'fit':<24}{'rows':>11}{'wall s':>9}{'peak RSS MB':>13}{'fresh RMSE':>12}"
          f"{'RMSE / noise':>14}")
    for label, n, r in results:
        print(f"{label:<24}{n:>11,}{r['wall_seconds']:>9.1f}{r['peak_rss_mb']:>13.0f}"
              f"{r['fresh_rmse']:>12.4f}{r['fresh_rmse'] / NOISE:>14.3f}")
    ny = results[0][2]
    print(f"\nnystrom: {ny['method']}")
    for _label, n, r in results[1:]:
        gain = 1 - ny["fresh_rmse"] / r["fresh_rmse"]
        print(f"nystrom vs exact on {n:,} rows: RMSE ratio {ny['fresh_rmse'] / r['fresh_rmse']:.3f}"
              f" ({gain:.1%} better), time ratio {ny['wall_seconds'] / r['wall_seconds']:.2f}")
    out = ROOT / "bench" / "results"
    out.mkdir(exist_ok=True)
    (out / "scale_bench.json").write_text(json.dumps(
        {"machine": machine(), "rows": args.rows,
         "results": [{"fit": lab, "rows": n, **{k: r[k] for k in (
             "wall_seconds", "peak_rss_mb", "fresh_rmse", "method")}}
             for lab, n, r in results]}, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
