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
from collections.abc import Callable, Iterable
from datetime import datetime, timezone
from time import perf_counter

import orjson
from flask import Flask, Request

from service.store.names import valid_name

log = logging.getLogger("kridge.access")

HEADER = "X-Request-ID"
FIELDS = ("time", "request_id", "method", "route", "model", "version", "status", "rows",
          "latency_ms")
#: Keys of the WSGI environ where the predict route leaves (model, version) and its row
#: count for the access log and the error handlers: plain dict entries, cheaper than ``g``.
LABELS = "kridge.model_labels"
ROWS = "kridge.rows"
#: Environ key of the request id (for the shadow's pairs file).
REQUEST_ID = "kridge.request_id"
#: The route pattern, left by a layer that answers before Flask matches a rule.
ROUTE = "kridge.route"
#: Where the request of a logged call waits for its access-log line (popped then).
_REQUEST = "kridge.request"
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


class RequestLog:
    """WSGI middleware around the Flask app: the request id on every response and, with a
    sink, the access-log line.

    Plain WSGI rather than Flask's before/after-request hooks, which Flask looks up and
    wraps on every request and which read ``g`` and the request through context proxies:
    here it is one function call and one wrapped ``start_response``, and the predict
    shortcut in front of Flask (:mod:`service.routes.predict`) is covered too. Every
    response passes through ``start_response``, error answers included, so every one
    carries the header.
    """

    def __init__(self, wsgi_app: Callable, sink: AccessLog | None):
        self.wsgi_app = wsgi_app
        self.sink = sink

    def __call__(self, environ: dict, start_response: Callable) -> Iterable[bytes]:
        started = perf_counter()
        environ[REQUEST_ID] = rid = request_id(environ.get("HTTP_X_REQUEST_ID"))
        sink = self.sink
        status: list[str] = []

        def start(code: str, headers: list, exc_info=None):
            headers.append((HEADER, rid))
            if sink is not None:
                status.append(code)
            return start_response(code, headers, exc_info)

        body = self.wsgi_app(environ, start)
        if sink is not None:
            sink.write(_record(environ, rid, int(status[-1][:3]) if status else None,
                               started))
        return body


class LoggedRequest(Request):
    """Flask's request, also left in the environ so that the access log can read the
    matched route afterwards (Flask clears werkzeug's own reference when the request ends)."""

    def __init__(self, environ: dict, *args, **kwargs):
        super().__init__(environ, *args, **kwargs)
        environ[_REQUEST] = self


def install(app: Flask, target: str | None) -> None:
    """Wrap ``app``'s WSGI callable in :class:`RequestLog` (with a sink when ``target``).

    The predict route leaves (name, version) under :data:`LABELS` and its row count under
    :data:`ROWS` in the environ; other routes log the model named in the path (when valid)
    and no version or rows.
    """
    if target:
        app.request_class = LoggedRequest
    app.wsgi_app = RequestLog(app.wsgi_app, AccessLog(target) if target else None)


def _record(environ: dict, rid: str, status: int | None, started: float) -> dict:
    req = environ.pop(_REQUEST, None)  # popped: no request ↔ environ cycle left behind
    labels = environ.get(LABELS)
    if labels:
        model, version = labels[0], int(labels[1])
    else:
        model, version = (getattr(req, "view_args", None) or {}).get("name"), None
        if not valid_name(model):
            model = None
    rule = getattr(req, "url_rule", None)
    route = rule.rule if rule is not None else environ.get(ROUTE)
    return {
        "time": utc_now(),
        "request_id": rid,
        "method": environ.get("REQUEST_METHOD"),
        "route": route,
        "model": model,
        "version": version,
        "status": status,
        "rows": environ.get(ROWS),
        "latency_ms": round((perf_counter() - started) * 1e3, 3),
    }
