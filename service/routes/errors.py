"""App-wide error handlers: every failure answers with the JSON error body and is counted."""

from __future__ import annotations

import logging

from flask import Flask, request
from werkzeug.exceptions import HTTPException

from service import metrics
from service.access_log import LABELS
from service.errors import ApiError
from service.routes import json_response

log = logging.getLogger("kridge.service")


def api_error(exc: ApiError):
    label = request.environ.get(LABELS) or ((request.view_args or {}).get("name", ""), "")
    metrics.ERRORS.labels(label[0], label[1], exc.code).inc()
    return json_response(exc.body(), exc.status)


def http_error(exc: HTTPException, max_body_bytes: int):
    code = (exc.name or "error").lower().replace(" ", "_")
    message = {413: f"request body is larger than {max_body_bytes} bytes "
                    "(KRIDGE_MAX_BODY_BYTES)"}.get(exc.code, exc.description or exc.name)
    response = api_error(ApiError(exc.code or 500, code, message))
    allowed = getattr(exc, "valid_methods", None)
    if exc.code == 405 and allowed:  # RFC 9110 §15.5.6: a 405 must list what is allowed
        response.headers["Allow"] = ", ".join(allowed)
    return response


def unexpected(exc: Exception):
    log.exception("unhandled error on %s %s", request.method, request.path)
    metrics.ERRORS.labels("", "", "internal").inc()
    return json_response(ApiError(500, "internal", "internal error; see the service log")
                         .body(), 500)


def install(app: Flask, max_body_bytes: int) -> None:
    app.register_error_handler(ApiError, api_error)
    app.register_error_handler(HTTPException, lambda exc: http_error(exc, max_body_bytes))
    app.register_error_handler(Exception, unexpected)
