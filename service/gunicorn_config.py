"""gunicorn settings for the kridge service (``deploy/gunicorn.conf.py`` imports this).

Read by the gunicorn master before any worker starts, so the environment set here reaches
every worker before numpy is imported there:

- workers: ``KRIDGE_WORKERS``, else one worker per usable core (at least two); a core
  is what the affinity mask and a container's CPU quota allow (``settings.usable_cores``);
- connections: each worker is gunicorn's threaded worker with deadlines
  (:mod:`service.threaded_worker`): request heads are read by its event loop, and
  :data:`REQUEST_THREADS` threads read bodies and write answers, so slow or idle clients
  wait there instead of holding the worker; one request per worker computes at a time;
- engine threads: each worker gets ``cores // workers`` engine threads for large batches
  and a single-threaded BLAS, so workers × engine threads never exceed the cores;
- drain: ``KRIDGE_DRAIN_SECONDS`` > 0 turns SIGTERM into "not ready, keep answering, then
  stop" (:mod:`service.drain`); ``graceful_timeout`` then bounds how long a worker may take
  to finish the request it holds;
- logs: gunicorn's own messages stay plain text on stderr; the per-request access log is
  the service's JSON-lines log (``KRIDGE_ACCESS_LOG``), so gunicorn's is off;
- Prometheus multiprocess mode: a fresh metrics directory per master, cleaned at start and
  after each worker exits, so /metrics adds up every worker's figures.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from datetime import datetime, timezone

from service import drain
from service.settings import drain_seconds, usable_cores, worker_count

bind = os.environ.get("KRIDGE_BIND") or "127.0.0.1:8000"
workers = worker_count()
worker_class = "service.threaded_worker.DeadlineWorker"
#: Threads per worker for socket work (bodies in, answers out); computing is one at a time.
#: Each may hold one request body (at most KRIDGE_MAX_BODY_BYTES) and one answer.
REQUEST_THREADS = 4
threads = REQUEST_THREADS
timeout = 60
graceful_timeout = 10
#: A kept-alive connection's pause between requests (then closed), the same bound as a
#: request head's (service.threaded_worker.HEAD_SECONDS).
keepalive = 5
# HTTP/1.1 only: the worker reads request heads itself
http_protocols = "h1"
accesslog = None
errorlog = "-"
loglevel = os.environ.get("KRIDGE_LOG_LEVEL", "info")
wsgi_app = "service.wsgi:app"
# gunicorn ≥ 25.1 opens a management socket at one fixed path per user by default: several
# instances on a host would fight over it, and it is a way in that nobody here needs.
control_socket_disable = True

#: Seconds between SIGTERM and the workers being told to stop (0: stop at once).
DRAIN_SECONDS = drain_seconds()

os.environ.setdefault("KRIDGE_ENGINE_THREADS", str(max(1, usable_cores() // workers)))
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")
if not os.environ.get("PROMETHEUS_MULTIPROC_DIR"):
    os.environ["PROMETHEUS_MULTIPROC_DIR"] = tempfile.mkdtemp(prefix="kridge-metrics-")


def on_starting(server) -> None:
    """Start every run with an empty metrics directory (old worker files would add up)."""
    path = os.environ["PROMETHEUS_MULTIPROC_DIR"]
    shutil.rmtree(path, ignore_errors=True)
    os.makedirs(path, exist_ok=True)
    # workers inherit it: the page says from when its request counts run
    os.environ["KRIDGE_METRICS_SINCE"] = datetime.now(timezone.utc).isoformat(timespec="seconds")


def when_ready(server) -> None:
    """Listeners are open: from now on SIGTERM drains first (when a drain is configured)."""
    drain.install(server, DRAIN_SECONDS)


def child_exit(server, worker) -> None:
    """Drop a dead worker's live gauges (counters and histograms keep their totals)."""
    from prometheus_client import multiprocess

    multiprocess.mark_process_dead(worker.pid)
