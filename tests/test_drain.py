"""SIGTERM under load: a real gunicorn drains, and no client that behaves like a load balancer
sees a failed request."""

from __future__ import annotations

import json
import signal
import socket
import threading
import time
from pathlib import Path

import requests
from make_coating_data import TYPICAL_ROW
from service_helpers import Gunicorn, wait_for

from trainer.cli import main

ARGS = ["--target", "hardness_s", "--features", ",".join(TYPICAL_ROW), "--gamma", "0.2",
        "--ridge", "0.5", "--no-report", "--quiet"]
DRAIN_SECONDS = 3.0
# A balancer learns of the 503 from its next probe; until then it keeps sending. Half a
# second stands in for that probe period here (a value from common practice is 1–5 s).
BALANCER_LAG = 0.5


class Load:
    """Client threads posting predictions until the balancer would have taken us out."""

    def __init__(self, base: str, clients: int = 3):
        self.base = base
        self.not_ready_at: float | None = None
        self.ok = 0
        self.ok_after_not_ready = 0
        self.failures: list[str] = []
        self.readyz_bodies: list[dict] = []
        self.healthz_while_draining: list[int] = []
        self.lock = threading.Lock()
        self.done = threading.Event()
        self.threads = [threading.Thread(target=self.client, daemon=True)
                        for _ in range(clients)]
        self.threads.append(threading.Thread(target=self.probe, daemon=True))

    def start(self) -> None:
        for t in self.threads:
            t.start()

    def taken_out(self) -> bool:
        at = self.not_ready_at
        return at is not None and time.monotonic() > at + BALANCER_LAG

    def probe(self) -> None:
        """The balancer's readiness probe, every 50 ms, until the service is gone."""
        while not self.done.is_set() and not self.taken_out():
            try:
                r = requests.get(self.base + "/readyz", timeout=5)
            except requests.RequestException:
                return
            if r.status_code == 503 and self.not_ready_at is None:
                self.readyz_bodies.append(r.json())
                self.healthz_while_draining.append(
                    requests.get(self.base + "/healthz", timeout=5).status_code)
                self.not_ready_at = time.monotonic()
            time.sleep(0.05)

    def client(self) -> None:
        body = {"rows": [TYPICAL_ROW]}
        while not self.done.is_set() and not self.taken_out():
            draining = self.not_ready_at is not None
            try:
                r = requests.post(self.base + "/models/c/predict", json=body, timeout=10)
                good = r.status_code == 200 and len(r.json()["results"]) == 1
                outcome = None if good else f"HTTP {r.status_code}: {r.text[:200]}"
            except requests.RequestException as exc:
                outcome = f"{type(exc).__name__}: {exc}"
            with self.lock:
                if outcome is not None:
                    self.failures.append(outcome)
                else:
                    self.ok += 1
                    self.ok_after_not_ready += draining


def test_sigterm_drains_under_load_and_finishes_accepted_requests(tmp_path, small_csv):
    store = tmp_path / "store"
    assert main(["train", str(small_csv), "--name", "c", "--release", "--store", str(store),
                 *ARGS]) == 0
    log_path = tmp_path / "gunicorn.log"
    env = {"KRIDGE_DRAIN_SECONDS": str(DRAIN_SECONDS), "KRIDGE_TEST_LOG": str(log_path)}
    with Gunicorn(store, workers=2, env=env) as g:
        load = Load(g.base)
        load.start()
        wait_for(lambda: load.ok >= 30, 60, "the load to warm up")

        # A request accepted before SIGTERM that is still arriving when the workers are told
        # to stop: a slow client sends half its body now and the rest after the stop.
        slow = socket.create_connection(("127.0.0.1", g.port), timeout=30)
        payload = json.dumps({"rows": [TYPICAL_ROW]}).encode()
        head = (f"POST /models/c/predict HTTP/1.1\r\nHost: localhost\r\n"
                f"Content-Type: application/json\r\nContent-Length: {len(payload)}\r\n"
                "Connection: close\r\n\r\n").encode()
        slow.sendall(head + payload[:10])

        g.proc.send_signal(signal.SIGTERM)  # what the kubelet sends, by the master's pid
        try:
            for t in load.threads:
                t.join(timeout=DRAIN_SECONDS + 20)
        finally:
            load.done.set()
        assert load.failures == [], load.failures[:5]

        # the other worker stopping means the drain is over and both were told to stop
        wait_for(lambda: "Worker exiting" in log_path.read_text(), DRAIN_SECONDS + 20,
                 "the idle worker to stop")
        slow.sendall(payload[10:])
        answer = b""
        while chunk := slow.recv(65536):
            answer += chunk
        slow.close()
        assert g.proc.wait(timeout=30) == 0

    log = log_path.read_text()
    assert load.ok_after_not_ready > 0  # predictions kept being answered while not ready
    assert load.readyz_bodies[0]["draining"] is True and load.readyz_bodies[0]["ready"] is False
    assert load.healthz_while_draining == [200]  # liveness must not fail during a drain
    status, _, rest = answer.partition(b"\r\n")
    assert status == b"HTTP/1.1 200 OK", answer[:300]
    result = json.loads(rest.split(b"\r\n\r\n", 1)[1])
    assert len(result["results"]) == 1 and result["version"] == 1
    # the order gunicorn logged: drain began, drain ended, then the workers were stopped
    began, ended = log.index("drain: /readyz answers 503"), log.index("drain: 3 s over")
    assert began < ended < log.index("Worker exiting")


def test_without_a_drain_sigterm_stops_at_once(tmp_path, small_csv):
    """The default (KRIDGE_DRAIN_SECONDS unset): no 503 phase, gunicorn's plain stop."""
    store = tmp_path / "store"
    assert main(["train", str(small_csv), "--name", "c", "--release", "--store", str(store),
                 *ARGS]) == 0
    log_path = tmp_path / "gunicorn.log"
    with Gunicorn(store, workers=1, env={"KRIDGE_TEST_LOG": str(log_path)}) as g:
        assert g.get("/readyz").json()["draining"] is False
        g.proc.send_signal(signal.SIGTERM)
        assert g.proc.wait(timeout=30) == 0
    assert "drain:" not in Path(log_path).read_text()
