"""Start and stop a real gunicorn running the service, for integration tests and benches."""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import requests

ROOT = Path(__file__).resolve().parents[1]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class Gunicorn:
    """``python -m gunicorn`` with the packaged config, on a free localhost port."""

    def __init__(self, store: Path, workers: int = 2, env: dict | None = None,
                 app: str = "service.wsgi:app"):
        self.port = free_port()
        self.base = f"http://127.0.0.1:{self.port}"
        self.env = dict(os.environ, KRIDGE_STORE=str(store), KRIDGE_WORKERS=str(workers),
                        KRIDGE_BIND=f"127.0.0.1:{self.port}", **(env or {}))
        self.argv = [sys.executable, "-m", "gunicorn", "-c", "python:service.gunicorn_config",
                     "--bind", f"127.0.0.1:{self.port}", "--workers", str(workers), app]
        self.proc: subprocess.Popen | None = None

    def __enter__(self) -> Gunicorn:
        self.log = open(Path(self.env.get("KRIDGE_TEST_LOG", os.devnull)), "w")
        self.proc = subprocess.Popen(self.argv, env=self.env, cwd=ROOT, stdout=self.log,
                                     stderr=subprocess.STDOUT)
        try:
            self._wait_up(60.0)
        except BaseException:
            self.__exit__()
            raise
        return self

    def _wait_up(self, seconds: float) -> None:
        deadline = time.monotonic() + seconds
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(f"gunicorn exited with {self.proc.returncode}")
            try:
                requests.get(self.base + "/readyz", timeout=1)  # any answer: workers are up
                return
            except (requests.ConnectionError, requests.Timeout):
                pass
            time.sleep(0.1)
        raise RuntimeError(f"gunicorn did not start within {seconds:.0f} s")

    def __exit__(self, *exc) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)  # ended by its own pid
            try:
                self.proc.wait(timeout=20)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        self.log.close()

    def post(self, path: str, json=None, **kw) -> requests.Response:
        return requests.post(self.base + path, json=json, timeout=30, **kw)

    def get(self, path: str, **kw) -> requests.Response:
        return requests.get(self.base + path, timeout=30, **kw)
