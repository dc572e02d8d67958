"""Running the service under gunicorn: ``kridge serve`` (exec), and :class:`Gunicorn`, a
child process that ``kridge demo``, the tests and the benches start, wait for and stop."""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request


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


def free_port() -> int:
    """A localhost port nobody listens on right now."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class Gunicorn:
    """The service under gunicorn as a child process, ended by its own pid.

    ``env`` is laid over the environment :func:`serve_env` builds; ``app`` replaces the
    packaged WSGI app (e.g. ``"module:factory()"``); ``output`` takes gunicorn's stdout and
    stderr (a file, or ``subprocess.DEVNULL``; None: this process's own). As a context
    manager it starts, waits until /readyz answers (any status: a worker may be up but not
    ready) and stops.
    """

    def __init__(self, bind: str, workers: int | None = None, store: str | None = None,
                 env: dict | None = None, app: str | None = None, cwd: str | None = None,
                 output=None):
        self.bind = bind
        self.base = f"http://{bind}"
        self.env = {**serve_env(bind, workers, store), **(env or {})}
        self.argv = gunicorn_argv(bind, workers) + ([app] if app else [])
        self.cwd = cwd
        self.output = output
        self.proc: subprocess.Popen | None = None

    @classmethod
    def on_free_port(cls, store, workers: int = 2, **kw) -> Gunicorn:
        """On a free localhost port, its output discarded unless ``output`` is given."""
        kw.setdefault("output", subprocess.DEVNULL)
        return cls(f"127.0.0.1:{free_port()}", workers, str(store), **kw)

    @property
    def port(self) -> int:
        return int(self.bind.rpartition(":")[2])

    def start(self) -> Gunicorn:
        """Start gunicorn; a second call while it runs starts nothing (one child, one stop)."""
        if self.proc is not None and self.proc.poll() is None:
            return self
        err = None if self.output is None else subprocess.STDOUT
        self.proc = subprocess.Popen(self.argv, env=self.env, cwd=self.cwd, stdout=self.output,
                                     stderr=err)
        return self

    def wait_ready(self, timeout: float = 60.0, any_answer: bool = False) -> None:
        """Poll /readyz until it answers 200 (or anything, with ``any_answer``); RuntimeError
        when gunicorn exits first or ``timeout`` seconds pass."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(f"the service exited during start-up "
                                   f"(status {self.proc.returncode})")
            try:
                with urllib.request.urlopen(self.base + "/readyz", timeout=2) as r:
                    if r.status == 200:
                        return
            except urllib.error.HTTPError:
                if any_answer:
                    return
            except (urllib.error.URLError, OSError):
                pass
            time.sleep(0.1)
        raise RuntimeError(f"the service did not start within {timeout:.0f} s")

    def stop(self, grace: float = 20.0) -> None:
        """SIGTERM (gunicorn drains and stops its workers), SIGKILL after ``grace`` s."""
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout=grace)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()

    def __enter__(self) -> Gunicorn:
        self.start()
        try:
            self.wait_ready(any_answer=True)
        except BaseException:
            self.__exit__(None, None, None)
            raise
        return self

    def __exit__(self, *exc) -> None:
        self.stop()
