"""gunicorn settings for the kridge service (``deploy/gunicorn.conf.py`` imports this).

Read by the gunicorn master before any worker starts, so the environment set here reaches
every worker before numpy is imported there:

- BLAS threads: each worker gets ``cores // workers`` engine threads and a single-threaded
  BLAS, so workers × threads never exceed the cores;
- Prometheus multiprocess mode: a fresh metrics directory per master, cleaned at start and
  after each worker exits, so /metrics adds up every worker's figures.
"""

from __future__ import annotations

import os
import shutil
import tempfile

bind = os.environ.get("KRIDGE_BIND") or "127.0.0.1:8000"
workers = int(os.environ.get("KRIDGE_WORKERS") or 2)
worker_class = "sync"
timeout = 60
graceful_timeout = 10
keepalive = 5
accesslog = os.environ.get("KRIDGE_ACCESS_LOG") or None
errorlog = "-"
loglevel = os.environ.get("KRIDGE_LOG_LEVEL", "info")
wsgi_app = "service.wsgi:app"

_cores = os.cpu_count() or 1
os.environ.setdefault("KRIDGE_ENGINE_THREADS", str(max(1, _cores // workers)))
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")
if not os.environ.get("PROMETHEUS_MULTIPROC_DIR"):
    os.environ["PROMETHEUS_MULTIPROC_DIR"] = tempfile.mkdtemp(prefix="kridge-metrics-")


def on_starting(server) -> None:
    """Start every run with an empty metrics directory (old worker files would add up)."""
    path = os.environ["PROMETHEUS_MULTIPROC_DIR"]
    shutil.rmtree(path, ignore_errors=True)
    os.makedirs(path, exist_ok=True)


def child_exit(server, worker) -> None:
    """Drop a dead worker's live gauges (counters and histograms keep their totals)."""
    from prometheus_client import multiprocess

    multiprocess.mark_process_dead(worker.pid)
