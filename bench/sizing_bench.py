"""Sizing: memory and CPU of one service replica for a model of n rows and d features.

For a few trained rbf models, a real gunicorn (one worker, so each figure is one worker's)
is measured from /proc while requests arrive:

- the worker's anonymous (private) memory once the model is loaded;
- the model's array files' file-backed memory (the store reads arrays into the worker, so
  this stays near zero; the arrays count in the worker's private memory);
- the rise of the worker's peak memory (VmHWM) during a request of many rows;
- the worker's CPU seconds per request, for 1-row and 64-row requests;
- apart from HTTP, the engine's CPU per (query row, training row) pair: ``predict`` on a
  1,024-row batch in this process, one thread, CPU time (clean of the HTTP noise, so the
  kernel term's growth with n and d is fitted from it).

The constants of the sizing formula (:func:`plan`) are fitted by least squares and printed
beside the recorded ones (:data:`RECORDED`, which the README and the Kubernetes Deployment
use), with the ratio measured / formula for every point.

    python bench/sizing_bench.py [--sizes 2000x8,5000x8,5000x32,10000x16] [--requests 300]

The machines here are shared: run it when they are quiet, and read the ratios.
"""

from __future__ import annotations

import argparse
import csv
import json
import math
import os
import subprocess
import sys
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from bench.machine import add_json_option, header, save  # noqa: E402

WORK = ROOT / "bench" / "results" / "sizing"
MIB = 1 << 20


@dataclass(frozen=True)
class Constants:
    """The fitted parts of the sizing formula (memory in bytes, CPU in seconds)."""

    master: float  # private memory of the gunicorn master
    libraries: float  # file-backed memory of a worker besides the model (shared libraries)
    worker_base: float  # private memory of a worker, apart from the model
    worker_per_value: float  # ... per training value (row × feature)
    request_per_row: float  # peak rise during a request, per request row
    request_per_value: float  # ... per request value (row × feature)
    cpu_per_request: float  # CPU of one request apart from its rows
    cpu_per_row: float  # CPU per request row apart from the kernel (parsing, envelope, answer)
    cpu_per_pair: float  # CPU per (request row, training row) pair
    cpu_per_pair_feature: float  # ... and per feature of that pair


#: Fitted by this script on a 2-core x86-64 machine (AVX-512, OpenBLAS Haswell kernels),
#: default sizes and 300 requests. Memory: 2026-12-02 on the machine shared with other work
#: (load average about 6), figures repeated within 3 %; a quiet rerun after the predict
#: shortcut measured the request rise at 0.2–0.4 × these constants and the private memory at
#: 1.04–1.10 ×: the totals stay on the safe side, so they were kept. CPU: the quiet rerun
#: (load average about 1), after the predict shortcut took Flask's per-request machinery off
#: the common request (1.85 ms per request before, on the busy machine).
RECORDED = Constants(
    master=15.0e6, libraries=22.4e6, worker_base=39.2e6, worker_per_value=22.5,
    request_per_row=6580.0, request_per_value=75.0,
    cpu_per_request=0.54e-3, cpu_per_row=33e-6, cpu_per_pair=1.42e-9,
    cpu_per_pair_feature=6.6e-11,
)


#: Rows of the novelty reference kept in a bundle (trainer/envelope_stats.py caps it).
REFERENCE_ROWS = 2000


def model_file_bytes(n: int, d: int, targets: int = 1) -> int:
    """Array files of a version, at most: training rows (n × d), novelty reference
    (min(n, 2000) × d), dual coefficients and leave-one-out residuals (n × targets each),
    float64, plus four 128-byte .npy headers."""
    return 8 * (n * d + min(n, REFERENCE_ROWS) * d + 2 * n * targets) + 4 * 128


def plan(n: int, d: int, *, targets: int = 1, workers: int = 2, max_rows: int = 10_000,
         rate: float = 0.0, rows_per_request: int = 1, utilisation: float = 0.7,
         c: Constants = RECORDED) -> dict[str, float]:
    """Memory and CPU one replica needs.

    memory = M + L + W·(B + b·n·d + R·(e + f·d) + 8·(n·d + min(n, 2000)·d + 2·n·t))
        M the master, L the shared libraries, W workers of B apart from the model and b per
        training value, R the most rows one request may carry (every worker may hold such
        a request at once), the last term the arrays, which every worker reads into its own
        memory and checksums there (the store's reader; the novelty reference is freed
        after the load, so the term is an upper bound).
    cores  = rate·(c0 + r·(c1 + n·(c2 + c3·d))) / u
        rate requests per second of r rows each, u the utilisation to plan for (headroom
        for bursts and for the autoscaler to act before latency grows).
    """
    per_worker = (c.worker_base + c.worker_per_value * n * d
                  + max_rows * (c.request_per_row + c.request_per_value * d))
    memory = c.master + c.libraries + workers * (per_worker + model_file_bytes(n, d, targets))
    cpu_s = c.cpu_per_request + rows_per_request * (
        c.cpu_per_row + n * (c.cpu_per_pair + c.cpu_per_pair_feature * d))
    return {"memory_bytes": memory, "cpu_seconds_per_request": cpu_s,
            "cores": rate * cpu_s / utilisation}


# -- measuring ---------------------------------------------------------------------------
def smaps(pid: int) -> dict[str, int]:
    out = {}
    for line in Path(f"/proc/{pid}/smaps_rollup").read_text().splitlines()[1:]:
        key, value = line.split(":", 1)
        out[key] = int(value.split()[0]) * 1024
    return out


def peak_bytes(pid: int) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) * 1024
    raise RuntimeError("no VmHWM")


def cpu_seconds(pid: int) -> float:
    """CPU time of every thread of ``pid`` in ns resolution (``/proc/*/task/*/schedstat``;
    the clock-tick counters in ``stat`` are 10 ms coarse, as long as a whole request)."""
    total = 0
    for task in Path(f"/proc/{pid}/task").iterdir():
        try:
            total += int((task / "schedstat").read_text().split()[0])
        except (OSError, ValueError):
            continue  # a thread that just ended
    return total / 1e9


def worker_pid(master: int) -> int:
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            try:
                fields = (entry / "stat").read_text().rsplit(")", 1)[1].split()
            except OSError:
                continue
            if int(fields[1]) == master:
                return int(entry.name)
    raise RuntimeError("no worker")


def train(store: Path, n: int, d: int) -> str:
    name = f"m{n}x{d}"
    if (store / name / "live.json").exists():
        return name
    rng = np.random.default_rng(n + d)
    x = rng.uniform(-1, 1, (n, d))
    y = np.sin(2 * x[:, 0]) + x[:, 1] * x[:, -1] + rng.normal(0, 0.1, n)
    WORK.mkdir(parents=True, exist_ok=True)
    path = WORK / f"{name}.csv"
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow([f"f{j}" for j in range(d)] + ["y"])
        w.writerows(np.column_stack([x, y]).tolist())
    print(f"training {name} once (cached in {store}) ...", flush=True)
    subprocess.run([sys.executable, "-m", "trainer.cli", "train", str(path), "--target", "y",
                    "--name", name, "--kernel", "rbf", "--gamma", str(1.0 / d), "--ridge",
                    "1.0", "--holdout", "0", "--no-report", "--quiet", "--release",
                    "--store", str(store)], check=True)
    return name


def measure(store: Path, name: str, n: int, d: int, requests_n: int, big_rows: int) -> dict:
    import requests

    from service.launch import Gunicorn

    rng = np.random.default_rng(3)
    env = {"KRIDGE_MAX_ROWS": str(max(big_rows, 64)), "KRIDGE_MAX_BODY_BYTES": str(64 * MIB)}
    from service.store import Store

    live = Store(store).live_version(name)
    files = sum(p.stat().st_size for p in (store / name).glob(f"versions/{live}/arrays/*.npy"))
    with Gunicorn.on_free_port(store, 1, cwd=str(ROOT), env=env) as g:
        worker = worker_pid(g.proc.pid)
        url = f"{g.base}/models/{name}/predict"
        session = requests.Session()

        def send(rows: int, times: int) -> float:
            body = json.dumps({"rows": rng.uniform(-1, 1, (rows, d)).round(5).tolist()})
            headers = {"Content-Type": "application/json"}
            t0 = cpu_seconds(worker)
            for _ in range(times):
                r = session.post(url, data=body, headers=headers, timeout=120)
                assert r.status_code == 200, r.text[:300]
            return (cpu_seconds(worker) - t0) / times

        send(1, 20)  # warm: first-touch of the arrays, lazy imports
        send(64, 5)
        mem = smaps(worker)
        private = mem["Anonymous"]
        libraries = max(mem["Rss"] - mem["Anonymous"] - files, 0)
        master = smaps(g.proc.pid)["Anonymous"]
        cpu1 = send(1, requests_n)
        cpu64 = send(64, max(20, requests_n // 8))
        before = peak_bytes(worker)
        send(big_rows, 2)
        rise = peak_bytes(worker) - before
    return {"n": n, "d": d, "private": private, "files": files, "rise": rise,
            "master": master, "libraries": libraries,
            "big_rows": big_rows, "cpu1": cpu1, "cpu64": cpu64}


def measure_follow(store: Path, name: str, replicas: int = 2, changes: int = 20) -> list[float]:
    """Seconds from a release (live.json replaced) until every replica answers with it."""
    import time
    from contextlib import ExitStack

    import requests

    from service.launch import Gunicorn
    from service.store import Store

    st = Store(store)
    if len(st.versions(name)) < 2:  # a second version to switch between (same data)
        manifest = st.read_manifest(name, 1)
        data = WORK / f"{name}.csv"
        subprocess.run([sys.executable, "-m", "trainer.cli", "train", str(data), "--target",
                        "y", "--name", name, "--kernel", "rbf", "--gamma",
                        str(manifest["kernel"]["params"]["gamma"]), "--ridge", "2.0",
                        "--holdout", "0", "--no-report", "--quiet", "--store", str(store)],
                       check=True)
    body = {"rows": [[0.0] * len(st.read_manifest(name, 1)["features"])]}
    took = []
    with ExitStack() as stack:
        gs = [stack.enter_context(Gunicorn.on_free_port(store, 1, cwd=str(ROOT)))
              for _ in range(replicas)]
        url = f"/models/{name}/predict"
        for i in range(changes):
            target = 1 + (st.live_version(name) % 2)
            t0 = time.monotonic()
            st.release(name, target)
            pending = set(range(replicas))
            while pending:
                for j in list(pending):
                    r = requests.post(gs[j].base + url, json=body, timeout=30)
                    if r.headers.get("X-Model-Version") == str(target):
                        pending.discard(j)
                assert time.monotonic() - t0 < 30, f"change {i} not followed"
            took.append(time.monotonic() - t0)
    return took


def engine_cpu_per_row(store: Path, name: str, d: int, rows: int = 1024) -> float:
    """CPU seconds per query row of ``predict`` (kernel and product, no envelope or HTTP)."""
    import time

    from threadpoolctl import threadpool_limits

    from service import load_model

    model = load_model(store, name)
    q = np.random.default_rng(5).uniform(-1, 1, (rows, d))
    with threadpool_limits(1):
        model.predict(q[:64])
        best = math.inf
        for _ in range(3):
            t0 = time.process_time()
            model.predict(q)
            best = min(best, time.process_time() - t0)
    return best / rows


def fit(points: list[dict]) -> Constants:
    """Non-negative least squares (scipy.optimize.nnls): no constant may come out below 0."""
    from scipy.optimize import nnls

    def solve(rows, y):
        return nnls(np.array(rows, float), np.array(y, float))[0]

    mem = solve([[1, p["n"] * p["d"]] for p in points], [p["private"] for p in points])
    rise = solve([[p["big_rows"], p["big_rows"] * p["d"]] for p in points],
                 [max(p["rise"], 0) for p in points])
    pair, pair_feature = solve([[p["n"], p["n"] * p["d"]] for p in points],
                               [p["engine_row"] for p in points])
    cpu_rows, cpu_y = [], []
    for p in points:  # the HTTP figures less the engine's share
        kernel = p["n"] * (pair + pair_feature * p["d"])
        for r, key in ((1, "cpu1"), (64, "cpu64")):
            cpu_rows.append([1, r])
            cpu_y.append(p[key] - r * kernel)
    cpu = (*solve(cpu_rows, cpu_y), pair, pair_feature)
    master = max(p["master"] for p in points)
    libraries = max(p["libraries"] for p in points)
    return Constants(master, libraries, *(float(v) for v in (*mem, *rise, *cpu)))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="2000x8,5000x8,5000x32,10000x16")
    ap.add_argument("--requests", type=int, default=300)
    ap.add_argument("--big-rows", type=int, default=5000)
    add_json_option(ap)
    args = ap.parse_args()
    print(header("sizing bench: memory and CPU per request against the sizing formula"))
    print("# one gunicorn worker per measurement")
    store = WORK / "store"
    sizes = [tuple(int(v) for v in s.split("x")) for s in args.sizes.split(",")]
    os.environ["KRIDGE_ENGINE_THREADS"] = "1"  # for the in-process engine figures
    points = []
    for n, d in sizes:
        name = train(store, n, d)
        point = measure(store, name, n, d, args.requests, args.big_rows)
        point["engine_row"] = engine_cpu_per_row(store, name, d)
        points.append(point)
    fitted = fit(points)
    print(f"\n{'n':>6s} {'d':>3s} {'worker MiB':>10s} {'files MiB':>9s} "
          f"{'rise MiB':>8s} {'CPU µs 1 row':>12s} {'CPU µs 64 rows':>14s} "
          f"{'engine µs/row':>13s}   "
          "measured / recorded formula: private, rise, CPU 1, CPU 64")
    for p in points:
        rec = plan(p["n"], p["d"], workers=1, max_rows=0)
        private_f = (rec["memory_bytes"] - model_file_bytes(p["n"], p["d"]) - RECORDED.master
                     - RECORDED.libraries)
        rise_f = p["big_rows"] * (RECORDED.request_per_row + RECORDED.request_per_value * p["d"])
        c1 = plan(p["n"], p["d"], rows_per_request=1)["cpu_seconds_per_request"]
        c64 = plan(p["n"], p["d"], rows_per_request=64)["cpu_seconds_per_request"]
        ratios = [p["private"] / private_f, p["rise"] / rise_f if rise_f else math.nan,
                  p["cpu1"] / c1, p["cpu64"] / c64]
        print(f"{p['n']:6d} {p['d']:3d} {p['private'] / MIB:10.1f} {p['files'] / MIB:9.2f} "
              f"{p['rise'] / MIB:8.1f} {p['cpu1'] * 1e6:12.0f} {p['cpu64'] * 1e6:14.0f} "
              f"{p['engine_row'] * 1e6:13.1f}   "
              + "  ".join(f"{r:5.2f}" for r in ratios))
        assert p["files"] <= model_file_bytes(p["n"], p["d"])
    print(f"master private {max(p['master'] for p in points) / MIB:.1f} MiB, worker shared "
          f"libraries {max(p['libraries'] for p in points) / MIB:.1f} MiB")
    print("\nfitted constants (paste into RECORDED when they move):")
    for k, v in asdict(fitted).items():
        print(f"  {k:22s} {v:.4g}   recorded {getattr(RECORDED, k):.4g}")
    took = sorted(measure_follow(store, f"m{sizes[-1][0]}x{sizes[-1][1]}"))
    print(f"\nrelease → every one of 2 replicas serving it (KRIDGE_POLL_SECONDS 0.25, "
          f"{len(took)} changes, model {sizes[-1][0]}x{sizes[-1][1]}): median "
          f"{took[len(took) // 2]:.2f} s, max {took[-1]:.2f} s")
    save(args.json, "sizing", {
        "points": [{k: p[k] for k in ("n", "d", "private", "rise", "cpu1", "cpu64", "engine_row")}
                   for p in points],
        "ratio_measured_to_formula": [
            {"n": p["n"], "d": p["d"],
             "cpu1": p["cpu1"] / plan(p["n"], p["d"], rows_per_request=1)[
                 "cpu_seconds_per_request"],
             "cpu64": p["cpu64"] / plan(p["n"], p["d"], rows_per_request=64)[
                 "cpu_seconds_per_request"]} for p in points],
        "release_follow_s": {"median": took[len(took) // 2], "max": took[-1]},
        "fitted": asdict(fitted)})
    ex = plan(20_000, 16, workers=2, rate=200, c=fitted)
    print(f"\nexample, n=20,000 d=16, 2 workers, 10,000-row limit, 200 single-row req/s: "
          f"{ex['memory_bytes'] / MIB:.0f} MiB, {ex['cores']:.2f} cores at 70 % utilisation")


if __name__ == "__main__":
    main()
