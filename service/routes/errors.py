"""App-wide error handlers: every failure answers with the JSON error body and is counted."""

from __future__ import annotations

import logging

from flask import Flask, request
from werkzeug.exceptions import HTTPException

from service import metrics
from service.access_log import LABELS
from service.app_state import state
from service.errors import ApiError, ClientTooSlow
from service.request_body import body_too_large
from service.routes import json_response
from service.store.names import valid_name

log = logging.getLogger("kridge.service")


def api_error(exc: ApiError):
    label = request.environ.get(LABELS) or (
        metrics.model_label((request.view_args or {}).get("name", ""), in_store), "")
    metrics.ERRORS.labels(label[0], label[1], exc.code).inc()
    return json_response(exc.body(), exc.status)


def in_store(name: str) -> bool:
    """A model of that name is in the store (a folder under a valid name)."""
    return valid_name(name) and state().store.model_dir(name).is_dir()


def http_error(exc: HTTPException, max_body_bytes: int):
    if exc.code == 413:
        response = api_error(body_too_large(max_body_bytes))
    else:
        code = (exc.name or "error").lower().replace(" ", "_")
        response = api_error(ApiError(exc.code or 500, code, exc.description or exc.name))
    allowed = getattr(exc, "valid_methods", None)
    if exc.code == 405 and allowed:  # RFC 9110 §15.5.6: a 405 must list what is allowed
        response.headers["Allow"] = ", ".join(allowed)
    return response


def too_slow(exc: ClientTooSlow):
    """A body that did not arrive within the worker's deadline (any route reading one)."""
    return api_error(ApiError(408, "request_timeout", str(exc)))


def unexpected(exc: Exception):
    log.exception("unhandled error on %s %s", request.method, request.path)
    metrics.ERRORS.labels("", "", "internal").inc()
    return json_response(ApiError(500, "internal", "internal error; see the service log")
                         .body(), 500)


def install(app: Flask, max_body_bytes: int) -> None:
    app.register_error_handler(ApiError, api_error)
    app.register_error_handler(ClientTooSlow, too_slow)
    app.register_error_handler(HTTPException, lambda exc: http_error(exc, max_body_bytes))
    app.register_error_handler(Exception, unexpected)
