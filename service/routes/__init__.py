"""The service's routes, one blueprint per module (discovery, predict, admin), and what they
share: the JSON response and the model-name lookups that end in a 404."""

from __future__ import annotations

import orjson
from flask import Response
from pydantic import BaseModel

from service.app_state import state
from service.errors import ApiError
from service.store import StoreError, check_name


def json_response(body, status: int = 200, headers: dict | None = None) -> Response:
    return Response(orjson.dumps(body, option=orjson.OPT_SERIALIZE_NUMPY), status=status,
                    headers=headers, content_type="application/json")


def model_response(answer: BaseModel, status: int = 200) -> Response:
    """An answer built through its :mod:`service.schemas` class, the one the document shows;
    optional fields the route did not set are left out, as the schema allows."""
    return json_response(answer.model_dump(exclude_unset=True), status)


def model_name(name: str) -> str:
    """``name`` when it is a valid model name, else a 404 (an invalid name names no model)."""
    try:
        return check_name(name)
    except StoreError as exc:
        raise ApiError(404, "model_not_found", str(exc)) from None


def not_found(name: str, exc: StoreError) -> ApiError:
    """404 for a lookup that failed; never the store's folder in the message."""
    if not state().store.known(name):
        return ApiError(404, "model_not_found", f"no model named {name!r}")
    return ApiError(404, "model_not_found", str(exc))
