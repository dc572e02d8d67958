"""HTTP bench: our service against two reference servers on the same 20,000-row rbf model.

Every server runs under gunicorn with the same config and worker count; single-row requests
come from a load generator in other processes (wrk when installed, else bench/loadgen.py).
Servers run one at a time, in alternating rounds. Each figure is the best of its rounds,
taken figure by figure (the highest requests/s, the lowest p50, p99 and CPU: a stall on the
shared machine spoils one round's tail without saying anything about the server), and the
p99 ratio is also given as the median of the rounds' own ratios (each round's servers ran
back to back, under much the same load).
Each server is measured only once every worker has booted (the workers' CPU time has
stopped growing) and after an unmeasured warm-up second, so neither side is timed while a
worker is still importing or loading its model (which takes longer for ours: it verifies
the bundle and builds the engine) nor charged for that CPU.

    python bench/http_bench.py [--seconds 8] [--rounds 2] [--clients 4] [--workers 2]
                               [--before DIR]

``--before DIR`` adds a fourth server in every round: the service of another checkout (an
earlier commit, e.g. from ``git worktree add`` or ``git archive``) with its own gunicorn
config, so that a change is measured against what it replaces under the same load.

wrk is installed with apt-get (``apt-get update`` then ``apt-get install -y wrk``) when it is
missing and the bench runs as root; ``--no-install`` keeps the Python load generator instead.

Targets: ours ≥ 0.92 × (a) in requests/s with p99 no higher than (a)'s; (b) far below.
"""

from __future__ import annotations

import argparse
import csv
import json
import os
import re
import shutil
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from bench.loadgen import run_load  # noqa: E402
from bench.machine import add_json_option, header, save  # noqa: E402
from service.launch import Gunicorn  # noqa: E402

WORK = ROOT / "bench" / "results"
N_ROWS, N_FEATURES = 20_000, 16


def make_model(store: Path) -> None:
    """Train (once, cached) a 20,000 × 16 rbf model on a smooth synthetic surface."""
    from service.store import Store

    if store.exists() and Store(store).live_version("bench"):
        return
    rng = np.random.default_rng(7)
    x = rng.uniform(-1, 1, (N_ROWS, N_FEATURES))
    y = np.sin(2 * x[:, 0]) + x[:, 1] * x[:, 2] + 0.5 * np.cos(3 * x[:, 3]) + x[:, 4:].sum(1) / 4
    y += rng.normal(0, 0.1, N_ROWS)
    path = WORK / "bench_train.csv"
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow([f"f{j}" for j in range(N_FEATURES)] + ["y"])
        w.writerows(np.column_stack([x, y]).tolist())
    print(f"training the {N_ROWS}-row bench model once (cached in {store}) ...", flush=True)
    subprocess.run([sys.executable, "-m", "trainer.cli", "train", str(path), "--target", "y",
                    "--name", "bench", "--method", "exact", "--kernel", "rbf", "--gamma", "0.05",
                    "--ridge", "1.0",
                    "--holdout", "0", "--no-report", "--release", "--store", str(store)],
                   check=True)


def workers_cpu(master_pid: int) -> tuple[int, float]:
    """(worker count, user + system CPU seconds) of the gunicorn master's worker processes
    (Linux /proc)."""
    tick = os.sysconf("SC_CLK_TCK")
    count, total = 0, 0.0
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            fields = (entry / "stat").read_text().rsplit(")", 1)[1].split()
        except OSError:
            continue
        if int(fields[1]) == master_pid:  # ppid
            count += 1
            total += (int(fields[11]) + int(fields[12])) / tick
    return count, total


def wait_booted(master_pid: int, workers: int, timeout: float = 60.0) -> None:
    """Return once ``workers`` workers exist and none used CPU for 0.3 s: all have imported
    the app and loaded the model (/readyz answers as soon as the first one has)."""
    deadline = time.monotonic() + timeout
    last = None
    while time.monotonic() < deadline:
        count, cpu = workers_cpu(master_pid)
        if count == workers and last is not None and cpu - last < 0.015:
            return
        last = cpu if count == workers else None
        time.sleep(0.3)
    raise RuntimeError(f"the workers did not settle within {timeout:.0f} s")


def best_figures(runs: list[dict]) -> dict:
    """Each figure's best over the rounds: the most requests/s, the least latency and CPU;
    errors are summed over all rounds, never hidden."""
    best = dict(runs[0])
    for key in ("p50_ms", "p99_ms", "cpu_us"):
        best[key] = min(r[key] for r in runs)
    best["rps"] = max(r["rps"] for r in runs)
    best["errors"] = sum(r["errors"] for r in runs)
    return best


def wrk_load(base: str, body: bytes, seconds: float, clients: int) -> dict:
    script = WORK / "post.lua"
    script.write_text('wrk.method = "POST"\nwrk.headers["Content-Type"] = "application/json"\n'
                      f"wrk.body = {json.dumps(body.decode())}\n")
    out = subprocess.run(["wrk", "-t", "1", "-c", str(clients), "-d", f"{int(seconds)}s",
                          "--latency", "-s", str(script), base + "/models/bench/predict"],
                         capture_output=True, text=True, check=True).stdout

    def ms(label):
        m = re.search(rf"{label}%\s+([\d.]+)(us|ms|s)", out)
        v = float(m.group(1))
        return v / 1e3 if m.group(2) == "us" else v * 1e3 if m.group(2) == "s" else v

    rps = float(re.search(r"Requests/sec:\s+([\d.]+)", out).group(1))
    return {"rps": rps, "p50_ms": ms("50"), "p99_ms": ms("99"), "errors": 0}


def ensure_wrk(install: bool) -> bool:
    """True when wrk is on PATH, after installing its Debian package if allowed and possible."""
    if shutil.which("wrk"):
        return True
    if not install or not shutil.which("apt-get") or os.geteuid() != 0:
        return False
    print("wrk is missing: apt-get update && apt-get install -y wrk ...", flush=True)
    for cmd in (["apt-get", "update", "-q"], ["apt-get", "install", "-y", "-q", "wrk"]):
        if subprocess.run(cmd, capture_output=True, text=True).returncode:
            print(f"  {' '.join(cmd)} failed; using bench/loadgen.py")
            return False
    return shutil.which("wrk") is not None


def measure(tree: Path, app: str, store: Path, body: bytes, args, use_wrk: bool,
            env: dict | None = None, probe=None) -> dict:
    """One server's single-row figures: requests/s, p50, p99 and worker CPU per request;
    ``probe(g)``, when given, adds what it returns (read from the server before it stops)."""
    # the tree's service and gunicorn config come first on the path
    with Gunicorn.on_free_port(store, args.workers, cwd=str(tree), app=app,
                               env={"BENCH_MODEL": "bench", "PYTHONPATH": str(tree),
                                    **(env or {})}) as g:
        wait_booted(g.proc.pid, args.workers)
        # one unmeasured second: first-request costs (lazy imports, metric files)
        if use_wrk:
            wrk_load(g.base, body, 1, args.clients)
        else:
            run_load("127.0.0.1", g.port, "/models/bench/predict", body, 1, args.clients)
        cpu0 = workers_cpu(g.proc.pid)[1]
        if use_wrk:
            res = wrk_load(g.base, body, args.seconds, args.clients)
        else:
            res = run_load("127.0.0.1", g.port, "/models/bench/predict", body,
                           args.seconds, args.clients)
        # server CPU per request: what the handler costs, whatever the client's share
        res["cpu_us"] = ((workers_cpu(g.proc.pid)[1] - cpu0)
                         / max(res["rps"] * args.seconds, 1) * 1e6)
        if probe is not None:
            res.update(probe(g))
    return res


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=8.0)
    ap.add_argument("--rounds", type=int, default=2)
    ap.add_argument("--clients", type=int, default=4)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--no-install", action="store_true", help="never apt-get install wrk")
    ap.add_argument("--before", type=Path, help="another checkout's service, run alongside")
    ap.add_argument("--traffic", action="store_true",
                    help="instead: ours with drift sampling and a shadow version on and off "
                         "(bench/traffic_bench.py)")
    add_json_option(ap)
    args = ap.parse_args()
    if args.traffic:
        from bench.traffic_bench import run_traffic

        return run_traffic(args)
    print(header("http bench: kridge vs a bare Flask handler and a scikit-learn handler"))
    WORK.mkdir(parents=True, exist_ok=True)
    store = WORK / "store-exact"  # an exact model: k(x, X)·α over all 20,000 rows
    make_model(store)
    row = np.random.default_rng(1).uniform(-0.5, 0.5, N_FEATURES).round(4).tolist()
    body = json.dumps({"rows": [row]}).encode()
    servers = {
        "ours": "service.wsgi:app",
        "(a) bare numpy": "bench.reference_apps:make('bare')",
        "(b) scikit-learn": "bench.reference_apps:make('sklearn')",
    }
    use_wrk = ensure_wrk(not args.no_install)
    print(f"load generator: {'wrk' if use_wrk else 'bench/loadgen.py'}, {args.clients} "
          f"concurrent clients, {args.seconds:.0f} s per run, {args.workers} gunicorn workers, "
          f"{args.rounds} rounds")
    trees = dict.fromkeys(servers, ROOT)
    if args.before:
        servers["ours, before"] = "service.wsgi:app"
        trees["ours, before"] = args.before.resolve()
    seen: dict[str, list[dict]] = {label: [] for label in servers}
    for rnd in range(args.rounds):
        for label, app in servers.items():
            res = measure(trees[label], app, store, body, args, use_wrk)
            print(f"  round {rnd + 1} {label:18s} {res['rps']:8.0f} req/s  p50 "
                  f"{res['p50_ms']:6.2f} ms  p99 {res['p99_ms']:6.2f} ms  worker CPU "
                  f"{res['cpu_us']:5.0f} µs/req  errors {res['errors']}", flush=True)
            seen[label].append(res)
    best = {label: best_figures(runs) for label, runs in seen.items()}
    ours, bare, skl = (best[k] for k in list(servers)[:3])
    keys = list(servers)
    p99_rounds = [o["p99_ms"] / b["p99_ms"] for o, b in zip(seen[keys[0]], seen[keys[1]],
                                                                 strict=True)]
    print("\nbest of rounds, figure by figure:")
    print(f"{'server':18s} {'req/s':>8s} {'p50 ms':>8s} {'p99 ms':>8s} {'CPU µs/req':>11s}")
    for label, res in best.items():
        print(f"{label:18s} {res['rps']:8.0f} {res['p50_ms']:8.2f} {res['p99_ms']:8.2f} "
              f"{res['cpu_us']:11.0f}")
    print(f"\nours / (a) requests/s: {ours['rps'] / bare['rps']:.2f}   (target >= 0.92)")
    print(f"ours / (a) p99:        {ours['p99_ms'] / bare['p99_ms']:.2f}   (target <= 1.0); "
          f"round by round {', '.join(f'{r:.2f}' for r in p99_rounds)}, median "
          f"{float(np.median(p99_rounds)):.2f}")
    print(f"ours / (b) requests/s: {ours['rps'] / skl['rps']:.2f}")
    print(f"(a) / (b) requests/s:  {bare['rps'] / skl['rps']:.2f}")
    print(f"worker CPU per request, ours / (a): {ours['cpu_us'] / bare['cpu_us']:.2f} "
          "(server cost alone; the load generator shares the cores)")
    before = {}
    if args.before:  # round by round: each pair ran minutes apart at most
        for key in ("rps", "p99_ms"):
            before[key] = [o[key] / b[key] for o, b in zip(seen["ours"], seen["ours, before"],
                                                           strict=True)]
        print(f"ours / before ({args.before}), round by round: requests/s "
              f"{', '.join(f'{r:.2f}' for r in before['rps'])} (median "
              f"{float(np.median(before['rps'])):.2f}); p99 "
              f"{', '.join(f'{r:.2f}' for r in before['p99_ms'])} (median "
              f"{float(np.median(before['p99_ms'])):.2f})")
    save(args.json, "http", {
        "load_generator": "wrk" if use_wrk else "bench/loadgen.py", "clients": args.clients,
        "workers": args.workers, "seconds": args.seconds, "best": best,
        "ratio_rps_ours_to_bare": ours["rps"] / bare["rps"],
        "ratio_p99_ours_to_bare": ours["p99_ms"] / bare["p99_ms"],
        "ratio_p99_ours_to_bare_by_round": p99_rounds,
        "ratio_rps_ours_to_sklearn": ours["rps"] / skl["rps"],
        "ratio_cpu_ours_to_bare": ours["cpu_us"] / bare["cpu_us"],
        "ratio_ours_to_before_by_round": before})


if __name__ == "__main__":
    main()
