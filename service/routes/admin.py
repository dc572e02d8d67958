"""Release and rollback over HTTP, behind a bearer token (disabled when none is set).
Both verify the version first, as ``kridge release`` does. A refusal is a 409 (the store's
state does not allow it) or a 503 (this service cannot write the store: a read-only mount,
no write permission, a full disk), never a 500."""

from __future__ import annotations

import hmac
import logging

import orjson
from flask import Blueprint, request
from pydantic import ValidationError

from service.app_state import state
from service.errors import ApiError
from service.model import verifier
from service.routes import model_name, model_response, not_found
from service.schemas import ReleaseRequest, ReleaseResponse
from service.store import NotFound, StoreError, Unwritable

log = logging.getLogger("kridge.service")
bp = Blueprint("admin", __name__)


@bp.before_request
def require_admin() -> None:
    token = state().settings.admin_token
    if not token:
        raise ApiError(403, "admin_disabled",
                       "admin routes are disabled: set KRIDGE_ADMIN_TOKEN to enable them")
    given = request.headers.get("Authorization", "")
    scheme, _, value = given.partition(" ")
    if scheme.lower() != "bearer" or not hmac.compare_digest(
        value.strip().encode(), token.encode()
    ):
        raise ApiError(401, "unauthorized", "missing or wrong bearer token")


@bp.post("/models/<name>/release")
def release(name: str):
    store = state().store
    name = model_name(name)
    try:
        body = ReleaseRequest.model_validate(orjson.loads(request.get_data() or b"null"))
    except (orjson.JSONDecodeError, ValidationError):
        raise ApiError(422, "invalid_request",
                       'send {"version": N} with N a positive integer') from None
    try:
        rec = store.release(name, body.version, check=verifier(store, name))
    except StoreError as exc:
        log.warning("model %s: release of version %s refused: %s", name, body.version, exc)
        raise refusal(name, exc, "version_refused") from None
    return model_response(ReleaseResponse(model=name, **rec))


@bp.post("/models/<name>/rollback")
def rollback(name: str):
    store = state().store
    name = model_name(name)
    try:
        rec = store.rollback(name, check=verifier(store, name))
    except StoreError as exc:  # nothing earlier, damaged history, or a refused version
        raise refusal(name, exc, "rollback_refused") from None
    return model_response(ReleaseResponse(model=name, **rec))


def refusal(name: str, exc: StoreError, code: str) -> ApiError:
    """The answer to a release or rollback the store refused: 404 for an unknown model or
    version, 503 when this service cannot write the store, else 409 with ``code``."""
    if isinstance(exc, NotFound):
        return not_found(name, exc)
    if isinstance(exc, Unwritable):
        return ApiError(503, "store_unwritable", str(exc))
    return ApiError(409, code, str(exc))
