"""Request ids and the JSON-lines access log.

Every response carries ``X-Request-ID``: the caller's own when it is a sane short token
(1–64 characters of letters, digits and ``._:-``), else a fresh random one, so a caller can
quote it and an operator can find the request's line. With an access log configured
(``KRIDGE_ACCESS_LOG``), each request becomes one JSON object on one line::

    {"time": "2026-12-02T07:42:25.123Z", "request_id": "…", "method": "POST",
     "route": "/models/<name>/predict", "model": "coating", "version": 3, "status": 200,
     "rows": 1, "latency_ms": 0.61}

The line holds the route pattern, never the raw path or query, and no header: no token, no
store path and nothing the caller typed except a model name that passed the name check.
Each line goes out in one ``write`` (O_APPEND for files), so the lines of several worker
processes sharing stdout or one file never interleave.
"""

from __future__ import annotations

import logging
import os
import re
import secrets
import time
from datetime import datetime, timezone

import orjson
from flask import Flask, Response, g, request

from service.store import StoreError, check_name

log = logging.getLogger("kridge.access")

HEADER = "X-Request-ID"
FIELDS = ("time", "request_id", "method", "route", "model", "version", "status", "rows",
          "latency_ms")
_SANE_ID = re.compile(r"[A-Za-z0-9._:-]{1,64}")


def request_id(given: str | None) -> str:
    """The caller's id when it is a sane short token, else a new 128-bit random one."""
    if given and _SANE_ID.fullmatch(given):
        return given
    return secrets.token_hex(16)


class AccessLog:
    """Writes one JSON line per request to a file descriptor (stdout for ``-``)."""

    def __init__(self, target: str):
        if target == "-":
            self.fd = 1
        else:
            self.fd = os.open(target, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o640)
        self.failed = False

    def write(self, record: dict) -> None:
        try:
            os.write(self.fd, orjson.dumps(record) + b"\n")
        except OSError as exc:  # a full disk must not fail the request; say so once
            if not self.failed:
                log.error("access log write failed: %s", exc)
                self.failed = True


def utc_now() -> str:
    now = datetime.now(timezone.utc)
    return now.strftime("%Y-%m-%dT%H:%M:%S.") + f"{now.microsecond // 1000:03d}Z"


def install(app: Flask, target: str | None) -> None:
    """Register the request-id and access-log hooks on ``app``.

    The predict route leaves ``g.model_labels`` (name, version) and ``g.rows`` behind; other
    routes log the model named in the path (when valid) and no version or rows.
    """
    sink = AccessLog(target) if target else None

    @app.before_request
    def _start() -> None:
        g.request_started = time.perf_counter()
        g.request_id = request_id(request.headers.get(HEADER))

    @app.after_request
    def _finish(response: Response) -> Response:
        rid = g.get("request_id") or request_id(None)
        response.headers[HEADER] = rid
        if sink is not None:
            sink.write(_record(rid, response.status_code))
        return response


def _record(rid: str, status: int) -> dict:
    started = g.get("request_started")
    labels = g.get("model_labels")
    if labels:
        model, version = labels[0], int(labels[1])
    else:
        model, version = (request.view_args or {}).get("name"), None
        if model is not None:
            try:
                check_name(model)
            except StoreError:
                model = None
    rule = request.url_rule
    return {
        "time": utc_now(),
        "request_id": rid,
        "method": request.method,
        "route": rule.rule if rule is not None else None,
        "model": model,
        "version": version,
        "status": status,
        "rows": g.get("rows"),
        "latency_ms": round((time.perf_counter() - started) * 1e3, 3) if started else None,
    }
