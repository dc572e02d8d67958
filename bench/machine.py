"""What every bench prints first and stores beside its figures: the machine and its BLAS.

Figures from different machines, BLAS kernels or thread settings are not comparable, so each
bench prints :func:`header` before anything else, and ``--json FILE`` (see :func:`add_json_option`)
adds the bench's figures as one section of a JSON file, next to the same machine description.
``make bench`` points every bench at one file per run; ``bench/compare.py`` sets two such files
side by side.
"""

from __future__ import annotations

import datetime as _dt
import json
import os
import platform
import time
from pathlib import Path

#: Environment variables that change which BLAS kernel runs or how many threads it uses.
BLAS_ENV = ("OPENBLAS_CORETYPE", "OPENBLAS_L2_SIZE", "OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS",
            "MKL_NUM_THREADS")


def machine() -> dict:
    """Cores, BLAS libraries loaded now (threadpoolctl) and the BLAS environment."""
    import numpy as np
    from threadpoolctl import threadpool_info

    try:
        usable = len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        usable = os.cpu_count()
    blas = [
        {key: lib.get(key) for key in ("internal_api", "version", "architecture",
                                       "num_threads", "threading_layer", "prefix")}
        for lib in threadpool_info() if lib.get("user_api") == "blas"
    ]
    return {
        "cores": os.cpu_count(),
        "usable_cores": usable,
        "cpu": platform.processor() or platform.machine(),
        "python": platform.python_version(),
        "numpy": np.__version__,
        "blas": blas,
        "env": {k: os.environ.get(k) for k in BLAS_ENV},
    }


def fastest_call(call, repeats: int) -> float:
    """Seconds of the fastest of ``repeats`` calls of ``call`` (one warm-up call first): the
    least disturbed run on a shared machine."""
    call()
    best = float("inf")
    for _ in range(repeats):
        t0 = time.perf_counter()
        call()
        best = min(best, time.perf_counter() - t0)
    return best


def header(title: str, info: dict | None = None) -> str:
    """Two lines: the bench's title, then cores, BLAS (kernel, threads) and its environment."""
    info = info or machine()
    blas = "; ".join(
        f"{b['internal_api']} {b['version']} {b['architecture']} kernels, "
        f"{b['num_threads']} threads ({b['prefix']})" for b in info["blas"]
    ) or "none loaded"
    env = ", ".join(f"{k}={v}" for k, v in info["env"].items() if v is not None) or "none"
    return (f"# {title}\n# {info['cores']} cores ({info['usable_cores']} usable), "
            f"numpy {info['numpy']}, BLAS {blas}; BLAS environment: {env}")


def add_json_option(parser) -> None:
    parser.add_argument("--json", metavar="FILE",
                        help="add this run's figures as one section of FILE (created if missing)")


def save(path: str | os.PathLike | None, section: str, figures: dict) -> None:
    """Merge ``figures`` into ``path`` under ``benches[section]`` (no-op without a path)."""
    if not path:
        return
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    doc = json.loads(path.read_text()) if path.exists() else {}
    doc.setdefault("started", _dt.datetime.now().isoformat(timespec="seconds"))
    doc["machine"] = doc.get("machine") or machine()
    doc.setdefault("benches", {})[section] = {"machine": machine(), **figures}
    path.write_text(json.dumps(doc, indent=1, default=float) + "\n")
    print(f"figures added to {path} ({section})")
