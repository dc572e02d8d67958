"""Reading a 1,000,000-row CSV in chunks: kridge's reader against the previous one.

The previous reader (reproduced below as the reference) parsed with Python's csv module and
converted each 50,000-row chunk with numpy; kridge now reads through pyarrow (multi-threaded,
typed). Both read the same file, in alternating rounds; best of N.

    .venv/bin/python bench/reader_bench.py [--rows 1000000] [--rounds 3]
"""

from __future__ import annotations

import argparse
import csv
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from bench.machine import header  # noqa: E402
from trainer.read.columns import iter_chunks  # noqa: E402


def previous_reader(path: Path, columns: list[str], chunk_rows: int = 50_000) -> int:
    """Python's csv module, a cell list per row, numpy conversion per chunk."""
    rows_seen = 0
    with open(path, newline="", encoding="utf-8-sig") as fh:
        reader = csv.reader(fh)
        header = [h.strip() for h in next(reader)]
        idx = [header.index(c) for c in columns]
        rows: list[list[str]] = []
        for row in reader:
            if not row:
                continue
            rows.append([row[j] for j in idx])
            if len(rows) == chunk_rows:
                values = np.array(rows, dtype=np.float64)
                assert np.isfinite(values).all()
                rows_seen += values.shape[0]
                rows = []
        if rows:
            rows_seen += np.array(rows, dtype=np.float64).shape[0]
    return rows_seen


def ours(path: Path, columns: list[str]) -> int:
    return sum(values.shape[0] for _, values in iter_chunks(path, columns))


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--rounds", type=int, default=3)
    args = ap.parse_args()
    print(header("reader bench: kridge's CSV reader vs the previous one"))
    import pyarrow as pa
    import pyarrow.csv as pcsv

    rng = np.random.default_rng(0)
    names = [f"tag_{i}" for i in range(8)] + ["lab"]
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "export.csv"
        values = rng.standard_normal((args.rows, len(names)))
        pcsv.write_csv(pa.table({n: values[:, j] for j, n in enumerate(names)}), path)
        del values
        print(f"# reader bench: {args.rows} rows × {len(names)} columns, "
              f"{path.stat().st_size / 1e6:.0f} MB; cores {os.cpu_count()}")
        best = {"previous (csv module)": float("inf"), "kridge (pyarrow)": float("inf")}
        for _ in range(args.rounds):
            for label, fn in (("previous (csv module)", previous_reader),
                              ("kridge (pyarrow)", ours)):
                t0 = time.perf_counter()
                n = fn(path, names)
                best[label] = min(best[label], time.perf_counter() - t0)
                assert n == args.rows, (label, n)
        for label, s in best.items():
            print(f"{label:<24}{s:8.2f} s  {args.rows / s / 1e6:6.2f} M rows/s")
        ratio = best["previous (csv module)"] / best["kridge (pyarrow)"]
        print(f"speed-up: {ratio:.1f}× (target ≥ 5×)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
