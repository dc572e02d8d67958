"""A real gunicorn running the service for integration tests, with its output in
``$KRIDGE_TEST_LOG`` (discarded when unset) and requests-based ``get``/``post``."""

from __future__ import annotations

import os
from pathlib import Path

import requests

from service import launch
from service.launch import free_port

ROOT = Path(__file__).resolve().parents[1]

__all__ = ["ROOT", "Gunicorn", "free_port"]


class Gunicorn(launch.Gunicorn):
    """:class:`service.launch.Gunicorn` on a free localhost port, run from the checkout."""

    def __init__(self, store: Path, workers: int = 2, env: dict | None = None,
                 app: str = "service.wsgi:app"):
        super().__init__(f"127.0.0.1:{free_port()}", workers, str(store), env, app,
                         cwd=str(ROOT))

    def start(self) -> Gunicorn:
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
