"""Silent connections do not hold the service's workers (service/sync_worker.py).

Two connections that send nothing — what a browser's connection opened ahead of need looks
like — against a service with two workers: a plain sync worker would wait on each until
gunicorn's 60 s timeout killed it, and the request below would time out. Here the service
closes them after the first-byte bound and the request is answered.
"""

from __future__ import annotations

import socket
import time

import requests
from service_helpers import Gunicorn

from service.sync_worker import FIRST_BYTE_SECONDS


def test_silent_connections_are_closed_and_requests_still_answered(tmp_path):
    with Gunicorn(tmp_path / "store", workers=2) as g:
        silent = [socket.create_connection(("127.0.0.1", g.port)) for _ in range(4)]
        try:
            time.sleep(0.5)  # both workers have accepted one of them by now
            r = requests.get(g.base + "/healthz", timeout=4 * FIRST_BYTE_SECONDS)
            assert r.status_code == 200
            for s in silent:  # closed by the server: end of stream, no answer
                s.settimeout(4 * FIRST_BYTE_SECONDS)
                assert s.recv(1) == b""
            # a client that connects first and sends a moment later is still served
            with socket.create_connection(("127.0.0.1", g.port)) as late:
                late.settimeout(30)
                time.sleep(1.0)
                late.sendall(b"GET /healthz HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n")
                assert late.recv(64).startswith(b"HTTP/1.1 200")
        finally:
            for s in silent:
                s.close()
