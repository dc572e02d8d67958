"""``kridge serve``: replace this process with gunicorn running the service."""

from __future__ import annotations

import os
import sys


def gunicorn_argv(bind: str | None, workers: int | None) -> list[str]:
    """The command that runs the service under gunicorn with the packaged config."""
    argv = [sys.executable, "-m", "gunicorn", "-c", "python:service.gunicorn_config"]
    if bind:
        argv += ["--bind", bind]
    if workers:
        argv += ["--workers", str(workers)]
    return argv


def serve_env(bind: str | None, workers: int | None, store: str | None) -> dict[str, str]:
    env = dict(os.environ)
    if store:
        env["KRIDGE_STORE"] = os.path.abspath(store)
    if bind:
        env["KRIDGE_BIND"] = bind
    if workers:
        if workers < 1:
            raise ValueError("--workers must be at least 1")
        env["KRIDGE_WORKERS"] = str(workers)
    return env


def serve(bind: str | None = None, workers: int | None = None, store: str | None = None) -> int:
    """Exec gunicorn; returns only if that fails."""
    env = serve_env(bind, workers, store)
    argv = gunicorn_argv(bind, workers)
    os.execve(argv[0], argv, env)
    return 1  # pragma: no cover
