"""Nyström by CG on a local Dask cluster: the cost of an iteration at 10⁷ rows, measured.

The scale bench's process (:func:`bench.scale_bench.write_csv`, same response and noise) is
written to CSV, a Dask scheduler and ``--workers`` single-threaded workers are started on this
machine (``dask scheduler`` / ``dask worker`` of dask.distributed, each worker with
single-threaded BLAS, as kridge's own threads use it), and ``kridge train --solver cg
--cluster ADDRESS --cg-max-iter K`` fits it with ``--landmarks`` landmarks, stopped by the cap
after K iterations: a whole run would take most of an hour. Printed, from the manifest: the
seconds of the whole job, of the CG solve and per iteration, and the ESTIMATE, labelled as
such, of a whole run at ``--iterations`` iterations (what the validation rule needed at
10⁶ rows: README, "The CG solver"), and of the same run on ``--scale-workers`` workers with
``--scale-rows`` rows (an iteration's n·m kernel values shared by the workers' cores).

    .venv/bin/python bench/cluster_bench.py --rows 10000000 --landmarks 10000 --max-iter 2
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

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from bench.machine import header  # noqa: E402
from bench.scale_bench import KRIDGE, load_line, write_csv  # noqa: E402

DASK = str(Path(sys.executable).with_name("dask"))


def _spawn(argv: list[str], log: Path) -> subprocess.Popen:
    env = {**os.environ, "OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1"}
    with open(log, "w") as err:  # the child keeps its own copy of the descriptor
        return subprocess.Popen(argv, stdout=subprocess.DEVNULL, stderr=err, env=env)


def start_cluster(folder: Path, workers: int) -> tuple[str, list[subprocess.Popen]]:
    """A scheduler and ``workers`` workers on this machine; (address, processes)."""
    info = folder / "scheduler.json"
    info.unlink(missing_ok=True)
    procs = [_spawn([DASK, "scheduler", "--scheduler-file", str(info), "--no-dashboard"],
                    folder / "scheduler.log")]
    for i in range(workers):
        procs.append(_spawn([DASK, "worker", "--scheduler-file", str(info), "--nthreads", "1",
                             "--no-dashboard", "--name", f"w{i}"], folder / f"worker{i}.log"))
    from distributed import Client

    deadline = time.monotonic() + 120
    while True:
        if info.exists():
            try:
                with Client(scheduler_file=str(info), timeout="5s") as c:
                    if len(c.scheduler_info()["workers"]) == workers:
                        return json.loads(info.read_text())["address"], procs
            except (OSError, TimeoutError, ValueError):
                pass
        if time.monotonic() > deadline:
            stop(procs)
            raise SystemExit("the Dask cluster did not come up (see the logs in "
                             f"{folder})")
        time.sleep(1)


def stop(procs: list[subprocess.Popen]) -> None:
    """End the cluster's processes by their own pids, workers first."""
    for p in reversed(procs):
        p.terminate()
    for p in procs:
        try:
            p.wait(timeout=30)
        except subprocess.TimeoutExpired:
            p.kill()


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--landmarks", type=int, default=10_000)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--max-iter", type=int, default=2, help="CG iterations actually run")
    ap.add_argument("--iterations", type=int, default=23,
                    help="iterations a whole run needs, for the estimate")
    ap.add_argument("--scale-rows", type=int, default=100_000_000)
    ap.add_argument("--scale-workers", type=int, default=4)
    ap.add_argument("--cores-per-worker", type=int, default=2,
                    help="cores of each worker in the scaled estimate")
    ap.add_argument("--keep", help="folder to keep the data and store in")
    args = ap.parse_args()
    work = Path(args.keep or tempfile.mkdtemp(prefix="kridge-cluster-"))
    work.mkdir(parents=True, exist_ok=True)
    print(header("cluster bench: Nyström CG iterations on a local Dask cluster"))
    data = work / f"process_{args.rows}.csv"
    if not data.exists():
        t0 = time.perf_counter()
        write_csv(data, args.rows, seed=1)
        print(f"wrote {data.name}: {args.rows:,} rows in {time.perf_counter() - t0:.0f} s",
              flush=True)
    store = work / "store"
    shutil.rmtree(store, ignore_errors=True)
    address, procs = start_cluster(work, args.workers)
    try:
        before = os.getloadavg()
        t0 = time.perf_counter()
        run = subprocess.run(
            [KRIDGE, "train", str(data), "--target", "y", "--name", "cluster", "--store",
             str(store), "--no-report", "--quiet", "--json", "--method", "nystrom",
             "--landmarks", str(args.landmarks), "--solver", "cg", "--cluster", address,
             "--cg-max-iter", str(args.max_iter)], capture_output=True, text=True)
        wall = time.perf_counter() - t0
        load = load_line(before)
        if run.returncode:
            raise SystemExit(f"kridge train failed: {run.stderr}")
        from service.store import Store

        training = Store(store).read_manifest("cluster", 1)["training"]
    finally:
        stop(procs)
        if not args.keep:
            shutil.rmtree(work, ignore_errors=True)
    solve = training["solve"]
    per_it = solve["seconds"] / max(solve["iterations"], 1)
    n, m = training["parts"]["train"], args.landmarks
    before_cg = wall - solve["seconds"]
    whole = before_cg + args.iterations * per_it
    print(f"{args.rows:,} rows, {m:,} landmarks, {args.workers} workers × 1 thread: job "
          f"{wall:.0f} s ({load}); CG {solve['seconds']:.0f} s for {solve['iterations']} "
          f"iterations (stopped by {solve['stopped_by']}), {per_it:.1f} s per iteration, "
          f"{per_it / (n * m) * 1e9 * args.workers:.2f} core-ns per kernel value; "
          f"{before_cg:.0f} s of reading, tuning and set-up")
    print(f"ESTIMATE (arithmetic, not a run): the whole fit at {args.iterations} iterations "
          f"{whole:.0f} s ({whole / 60:.0f} min)")
    scale = args.scale_rows / args.rows
    cores = args.scale_workers * args.cores_per_worker
    it_big = per_it * scale * args.workers / cores
    print(f"ESTIMATE (arithmetic, not a run): {args.scale_rows:,} rows on {args.scale_workers} "
          f"workers of {args.cores_per_worker} cores: {per_it:.1f} s × {scale:g} (rows) × "
          f"{args.workers}/{cores} (cores) = {it_big:.0f} s per iteration, "
          f"{args.iterations} iterations {args.iterations * it_big / 3600:.1f} h, plus reading "
          f"and set-up (here {before_cg:.0f} s, of which the reading grows with the rows)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
