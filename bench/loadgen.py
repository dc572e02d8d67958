"""A small HTTP load generator for the benches (used when wrk is not installed).

Each client process sends the same prebuilt POST over a fresh localhost connection, reads the
whole answer, and records the latency; results are merged across processes. Raw sockets keep
the client's own cost low so the server, not the client, is what gets measured.
"""

from __future__ import annotations

import multiprocessing as mp
import socket
import time

import numpy as np


def _request_bytes(host: str, port: int, path: str, body: bytes) -> bytes:
    head = (f"POST {path} HTTP/1.1\r\nHost: {host}:{port}\r\nContent-Type: application/json\r\n"
            f"Content-Length: {len(body)}\r\nConnection: close\r\n\r\n")
    return head.encode() + body


def _one(host: str, port: int, payload: bytes) -> bool:
    with socket.create_connection((host, port), timeout=10) as s:
        s.sendall(payload)
        chunks = []
        while True:
            data = s.recv(65536)
            if not data:
                break
            chunks.append(data)
    return b" 200 " in chunks[0][:16] if chunks else False


def _client(host, port, payload, seconds, out_q) -> None:
    lat, errors = [], 0
    end = time.perf_counter() + seconds
    while (t0 := time.perf_counter()) < end:
        ok = _one(host, port, payload)
        lat.append(time.perf_counter() - t0)
        errors += not ok
    out_q.put((lat, errors))


def run_load(host: str, port: int, path: str, body: bytes, seconds: float = 8.0,
             clients: int = 4) -> dict:
    """Drive ``clients`` processes for ``seconds``; returns requests/s, p50/p99 (ms), errors."""
    payload = _request_bytes(host, port, path, body)
    for _ in range(20):  # warm-up: first requests load lazily in each worker
        _one(host, port, payload)
    ctx = mp.get_context("spawn")
    q = ctx.Queue()
    procs = [ctx.Process(target=_client, args=(host, port, payload, seconds, q))
             for _ in range(clients)]
    for p in procs:
        p.start()
    results = [q.get() for _ in procs]
    for p in procs:
        p.join()
    lat = np.concatenate([np.asarray(r[0]) for r in results])
    return {
        "requests": int(lat.size),
        "rps": lat.size / seconds,
        "p50_ms": float(np.percentile(lat, 50) * 1e3),
        "p99_ms": float(np.percentile(lat, 99) * 1e3),
        "errors": int(sum(r[1] for r in results)),
    }
