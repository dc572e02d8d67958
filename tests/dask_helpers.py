"""A real Dask cluster on localhost for tests: one scheduler and N workers (the ``dask``
command of dask.distributed), each process ended by its own pid."""

from __future__ import annotations

import subprocess
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from service_helpers import free_port


def _start(argv: list[str], log: Path) -> subprocess.Popen:
    return subprocess.Popen(argv, stdout=open(log, "w"), stderr=subprocess.STDOUT)


@contextmanager
def dask_cluster(folder: Path, workers: int = 2) -> Iterator[str]:
    """The scheduler's address, once every worker has joined."""
    dask = str(Path(sys.executable).with_name("dask"))
    port = free_port()
    address = f"tcp://127.0.0.1:{port}"
    procs = [_start([dask, "scheduler", "--host", "127.0.0.1", "--port", str(port),
                     "--no-dashboard"], folder / "scheduler.log")]
    try:
        for i in range(workers):
            procs.append(_start([dask, "worker", address, "--nthreads", "1", "--no-dashboard",
                                 "--name", f"w{i}"], folder / f"worker{i}.log"))
        from distributed import Client

        deadline = time.monotonic() + 60
        while True:
            try:
                with Client(address, timeout="2s") as c:
                    if len(c.scheduler_info()["workers"]) == workers:
                        break
            except (OSError, TimeoutError):
                pass
            assert time.monotonic() < deadline, "the Dask cluster did not come up"
            time.sleep(0.5)
        yield address
    finally:
        for p in reversed(procs):  # ended by their own pids
            p.terminate()
        for p in procs:
            try:
                p.wait(timeout=20)
            except subprocess.TimeoutExpired:
                p.kill()
