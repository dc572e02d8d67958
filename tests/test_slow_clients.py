"""Slow and idle clients do not hold the service (service/threaded_worker.py).

Real sockets against a real gunicorn with two workers: connections that send nothing,
clients trickling their headers a byte at a time, clients that post a large request and
never read the answer, idle kept-alive connections. A plain request is answered while all
of them still hold their connections (before the first deadline), and each slow one is cut
off by the server at its documented deadline.
"""

from __future__ import annotations

import json
import select
import socket
import threading
import time

import pytest
from make_coating_data import TYPICAL_ROW
from service_helpers import Gunicorn, small_model_store, wait_for

from service.threaded_worker import HEAD_SECONDS, SEND_SECONDS

#: Rows of the never-read answer: about 6 MB of JSON, more than the kernel buffers on both
#: sides of a localhost connection hold (4 MiB send buffer at most, tcp_wmem), so the
#: server's send really blocks.
BIG_ROWS = 40_000


@pytest.fixture(scope="module")
def store(tmp_path_factory, demo_csv):
    return small_model_store(tmp_path_factory.mktemp("slow"), demo_csv)


def closed_by_server(sock: socket.socket, seconds: float) -> bool:
    """True when the server ends the connection within ``seconds`` (what it sent before
    is read and dropped)."""
    sock.settimeout(seconds)
    try:
        while sock.recv(1 << 16):
            pass
    except ConnectionResetError:
        pass
    except TimeoutError:
        return False
    return True


def still_open(sock: socket.socket) -> bool:
    """Nothing to read, no end of stream: the server has not closed it."""
    readable, _, _ = select.select([sock], [], [], 0)
    return not readable


class Trickler(threading.Thread):
    """Sends a request head one byte every 0.4 s, never finishing it in time."""

    def __init__(self, port: int):
        super().__init__(daemon=True)
        self.sock = socket.create_connection(("127.0.0.1", port))
        self.sent = 0

    def run(self) -> None:
        head = b"GET /healthz HTTP/1.1\r\nHost: x\r\n" + b"X-Pad: " + b"a" * 200
        try:
            for byte in head:
                self.sock.sendall(bytes([byte]))
                self.sent += 1
                time.sleep(0.4)
        except OSError:  # the server closed it
            pass


def post_and_stall(port: int, body: bytes) -> tuple[socket.socket, int]:
    """Post ``body``, read the answer's head only, and stop reading; returns the socket and
    the announced Content-Length."""
    s = socket.socket()
    s.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4096)  # before connect: a small window
    s.connect(("127.0.0.1", port))
    s.sendall(b"POST /models/c/predict HTTP/1.1\r\nHost: x\r\nContent-Type: application/json"
              b"\r\nContent-Length: %d\r\n\r\n" % len(body) + body)
    s.settimeout(60)
    head = b""
    while b"\r\n\r\n" not in head:
        head += s.recv(1024)
    assert head.startswith(b"HTTP/1.1 200"), head[:200]
    length = int(head.split(b"Content-Length: ")[1].split(b"\r\n")[0])
    return s, length - len(head.split(b"\r\n\r\n", 1)[1])


def kept_alive(port: int) -> socket.socket:
    """A connection that made one keep-alive request, read its answer, and went quiet."""
    s = socket.create_connection(("127.0.0.1", port))
    s.sendall(b"GET /healthz HTTP/1.1\r\nHost: x\r\n\r\n")
    s.settimeout(30)
    answer = b""
    while b"\r\n\r\n" not in answer or not answer.endswith(b"}"):
        answer += s.recv(4096)
    assert answer.startswith(b"HTTP/1.1 200") and b"keep-alive" in answer.lower()
    return s


def test_slow_and_idle_clients_leave_the_service_answering(store, tmp_path):
    log = tmp_path / "gunicorn.log"
    env = {"KRIDGE_MAX_ROWS": str(BIG_ROWS), "KRIDGE_MAX_BODY_BYTES": str(16 << 20),
           "KRIDGE_TEST_LOG": str(log)}
    row = list(TYPICAL_ROW.values())
    big = json.dumps({"rows": [row] * BIG_ROWS, "coverage": 0.9}).encode()
    with Gunicorn(store, workers=2, env=env) as g:
        g.wait_ready()
        stalled = [post_and_stall(g.port, big) for _ in range(2)]
        t_stalled = time.monotonic()
        idle = [kept_alive(g.port) for _ in range(4)]
        silent = [socket.create_connection(("127.0.0.1", g.port)) for _ in range(4)]
        tricklers = [Trickler(g.port) for _ in range(4)]
        for t in tricklers:
            t.start()
        wait_for(lambda: all(t.sent >= 2 for t in tricklers), 30, "the tricklers to start")

        assert g.get("/healthz").status_code == 200
        r = g.post("/models/c/predict", json={"rows": [row]})
        assert r.status_code == 200 and len(r.json()["results"]) == 1
        # answered before the first deadline: every slow client still holds its connection
        waiting = [t.sock for t in tricklers] + silent + idle
        assert all(still_open(sock) for sock in waiting)

        # then the server cuts each one off: heads and idle pauses after HEAD_SECONDS,
        # answers SEND_SECONDS after they began
        for sock in waiting:
            assert closed_by_server(sock, HEAD_SECONDS + 20)
        time.sleep(max(0.0, t_stalled + SEND_SECONDS - time.monotonic()))
        for sock, length in stalled:
            got = 0
            sock.settimeout(30)
            try:
                while chunk := sock.recv(1 << 16):
                    got += len(chunk)
            except ConnectionResetError:
                pass
            assert got < length  # cut off, not delivered late
        for t in tricklers:
            t.join(timeout=30)
        for sock in waiting + [s for s, _ in stalled]:
            sock.close()
    text = log.read_text()
    assert text.count(f"did not take the answer within {SEND_SECONDS:g} s") == 2, text[-2000:]


def test_a_body_slower_than_its_deadline_gets_408(store):
    with Gunicorn(store, workers=1) as g:
        g.wait_ready()
        body = json.dumps({"rows": [list(TYPICAL_ROW.values())]}).encode()
        with socket.create_connection(("127.0.0.1", g.port)) as s:
            s.sendall(b"POST /models/c/predict HTTP/1.1\r\nHost: x\r\nContent-Type: "
                      b"application/json\r\nContent-Length: %d\r\n\r\n" % len(body)
                      + body[:5])
            s.settimeout(60)
            answer = b""
            while chunk := s.recv(4096):
                answer += chunk
        status, _, rest = answer.partition(b"\r\n")
        assert status.startswith(b"HTTP/1.1 408 "), answer[:300]
        err = json.loads(rest.split(b"\r\n\r\n", 1)[1])["error"]
        assert err["code"] == "request_timeout" and "did not arrive" in err["message"]
        assert g.get("/healthz").status_code == 200


def test_parsing_and_computing_hold_the_worker_slot(store, monkeypatch):
    """A worker's threads wait on sockets side by side, but parse and compute one request
    at a time (the cores and the sizing formula count one per worker)."""
    from service.answers import COMPUTE_SLOT
    from service.app import create_app
    from service.routes import predict
    from service.settings import Settings

    held = []
    parse, respond = predict.parse_body, predict.predict_response
    monkeypatch.setattr(predict, "parse_body",
                        lambda *a: held.append(COMPUTE_SLOT.locked()) or parse(*a))
    monkeypatch.setattr(predict, "predict_response",
                        lambda *a: held.append(COMPUTE_SLOT.locked()) or respond(*a))
    client = create_app(Settings(store=str(store)), watch=False).test_client()
    r = client.post("/models/c/predict", json={"rows": [list(TYPICAL_ROW.values())]})
    assert r.status_code == 200 and held == [True, True]
    assert not COMPUTE_SLOT.locked()
