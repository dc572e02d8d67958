"""What refusing an oversized predict body costs one gunicorn worker: its peak memory
(VmHWM in /proc/<pid>/status, Linux) before and after a body of 2.7 million empty rows
(8.1 MB, under the 8 MiB byte limit, far over the 10,000-row limit), and the time to the 413.

    python bench/body_limit_bench.py [--repeat 3]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import requests

ROOT = Path(__file__).resolve().parents[1]
sys.path[:0] = [str(ROOT), str(ROOT / "demo_data")]

from bench.http_bench import workers_cpu  # noqa: E402
from bench.machine import header  # noqa: E402
from bench.sizing_bench import worker_pid  # noqa: E402
from service.launch import Gunicorn  # noqa: E402

BODY = b'{"rows": [' + b"[]," * 2_700_000 + b"[]]}"


def peak_mib(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    raise RuntimeError("no VmHWM")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    print(header("body limit bench: one worker refusing 2.7 million rows"))
    from make_coating_data import TYPICAL_ROW

    from trainer.cli import main as kridge

    with tempfile.TemporaryDirectory() as tmp:
        store = Path(tmp) / "store"
        csv = Path(tmp) / "small.csv"
        lines = (ROOT / "demo_data" / "coating_line.csv").read_text().splitlines()[:61]
        csv.write_text("\n".join(lines) + "\n")
        assert kridge(["train", str(csv), "--target", "hardness_s", "--features",
                       ",".join(TYPICAL_ROW), "--name", "c", "--release", "--store", str(store),
                       "--no-report", "--quiet"]) == 0
        with Gunicorn.on_free_port(store, 1, cwd=str(ROOT)) as g:
            g.wait_ready()
            requests.post(g.base + "/models/c/predict", json={"rows": [TYPICAL_ROW]},
                          timeout=30)
            pid = worker_pid(g.proc.pid)
            print(f"body {len(BODY) / 1e6:.1f} MB; worker peak before: {peak_mib(pid):.0f} MiB")
            for _ in range(args.repeat):
                cpu0 = workers_cpu(g.proc.pid)[1]
                t0 = time.perf_counter()
                r = requests.post(g.base + "/models/c/predict", data=BODY, timeout=120,
                                  headers={"Content-Type": "application/json"})
                took = time.perf_counter() - t0
                cpu = workers_cpu(g.proc.pid)[1] - cpu0
                print(f"  {r.status_code} {r.json()['error']['code']}: {took:.2f} s, worker CPU "
                      f"{cpu:.2f} s, worker peak {peak_mib(pid):.0f} MiB")


if __name__ == "__main__":
    main()
