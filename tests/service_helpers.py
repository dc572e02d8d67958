"""A real gunicorn running the service for integration tests, with its output in
``$KRIDGE_TEST_LOG`` (discarded when unset) and requests-based ``get``/``post``; polls with a
deadline instead of fixed sleeps; the Prometheus samples a test reads back."""

from __future__ import annotations

import os
import time
from collections.abc import Callable
from pathlib import Path
from typing import TypeVar

import requests
from prometheus_client.parser import text_string_to_metric_families

from service import launch
from service.launch import free_port

ROOT = Path(__file__).resolve().parents[1]

__all__ = ["ROOT", "Gunicorn", "free_port", "holds_for", "metric_count", "metric_samples",
           "small_model_store", "wait_for"]

T = TypeVar("T")


class Gunicorn(launch.Gunicorn):
    """:class:`service.launch.Gunicorn` on a free localhost port, run from the checkout."""

    def __init__(self, store: Path, workers: int = 2, env: dict | None = None,
                 app: str = "service.wsgi:app"):
        super().__init__(f"127.0.0.1:{free_port()}", workers, str(store), env, app,
                         cwd=str(ROOT))

    def start(self) -> Gunicorn:
        if self.proc is not None and self.proc.poll() is None:
            return self  # already running: one child, one log file
        # closed in __exit__: the file outlives this call
        self.output = open(Path(self.env.get("KRIDGE_TEST_LOG", os.devnull)), "w")  # noqa: SIM115
        return super().start()

    def __exit__(self, *exc) -> None:
        super().__exit__(*exc)
        self.output.close()

    def post(self, path: str, json=None, **kw) -> requests.Response:
        return requests.post(self.base + path, json=json, timeout=30, **kw)

    def get(self, path: str, **kw) -> requests.Response:
        return requests.get(self.base + path, timeout=30, **kw)


def small_model_store(root: Path, demo_csv: Path, name: str = "c") -> Path:
    """A store under ``root`` with model ``name`` (version 1, live): a fixed rbf model (no
    tuning, so it trains in a moment) of hardness on the first 60 rows of the demo data."""
    from make_coating_data import TYPICAL_ROW

    from trainer.cli import main

    csv = root / "small.csv"
    csv.write_text("\n".join(demo_csv.read_text().splitlines()[:61]) + "\n")
    assert main(["train", str(csv), "--name", name, "--release", "--store",
                 str(root / "store"), "--target", "hardness_s", "--features",
                 ",".join(TYPICAL_ROW), "--gamma", "0.2", "--ridge", "0.5", "--no-report",
                 "--quiet"]) == 0
    return root / "store"


def wait_for(predicate: Callable[[], T], seconds: float = 30.0, what: str = "the condition",
             interval: float = 0.02) -> T:
    """Call ``predicate`` until it returns something truthy and return that; AssertionError
    naming ``what`` when ``seconds`` pass first. The deadline is generous: it only bounds a
    hung test, it is not a speed claim."""
    deadline = time.monotonic() + seconds
    while True:
        value = predicate()
        if value:
            return value
        assert time.monotonic() < deadline, f"timed out after {seconds} s waiting for {what}"
        time.sleep(interval)


def holds_for(check: Callable[[], bool], seconds: float, what: str = "the condition") -> int:
    """Assert ``check()`` on every call for ``seconds`` (something that must not change while
    the service gets time to act); returns how many checks ran (at least one)."""
    deadline = time.monotonic() + seconds
    calls = 0
    while True:
        assert check(), f"{what} stopped holding after {calls} checks"
        calls += 1
        if time.monotonic() >= deadline:
            return calls


def metric_samples(text: str) -> dict[tuple[str, tuple], float]:
    """Prometheus text exposition → {(sample name, sorted labels): value}."""
    out = {}
    for fam in text_string_to_metric_families(text):
        for s in fam.samples:
            out[(s.name, tuple(sorted(s.labels.items())))] = s.value
    return out


def metric_count(samples: dict, name: str, **labels: str) -> float:
    """Sum of the samples called ``name`` whose labels include ``labels``."""
    return sum(v for (n, lab), v in samples.items()
               if n == name and all(dict(lab).get(k) == x for k, x in labels.items()))
