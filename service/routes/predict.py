"""The predict route: pick the model version, parse the rows, answer, count."""

from __future__ import annotations

import time

from flask import Blueprint, g, request

from service import metrics
from service.answers import parse_body, predict_response
from service.app_state import state
from service.errors import ApiError
from service.model import Model
from service.routes import json_response, model_name, not_found
from service.store import NotFound, StoreError

bp = Blueprint("predict", __name__)


def sends_json(environ: dict) -> bool:
    """Content-Type is application/json or a +json type (werkzeug's rule, without the cost)."""
    mime = environ.get("CONTENT_TYPE", "").split(";", 1)[0].strip().lower()
    return mime == "application/json" or (mime.startswith("application/")
                                           and mime.endswith("+json"))


def chosen_model(name: str) -> Model:
    """The live version, or the one ``?version=N`` pins."""
    models = state().models
    # request.args parses even an empty query string; most calls have none
    pinned = request.args.get("version") if request.environ.get("QUERY_STRING") else None
    try:
        if pinned is None:
            return models.live(name)
        if not pinned.isdigit() or int(pinned) < 1:
            raise ApiError(400, "invalid_version",
                           f"version must be a positive integer, got {pinned!r}")
        return models.pinned_version(name, int(pinned))
    except NotFound as exc:
        raise not_found(name, exc) from None
    except StoreError as exc:
        raise ApiError(404, "version_unavailable", str(exc)) from None


@bp.post("/models/<name>/predict")
def predict(name: str):
    t_start = time.perf_counter()
    name = model_name(name)
    model = chosen_model(name)
    g.model_labels = (name, str(model.version))
    if not sends_json(request.environ):
        raise ApiError(415, "unsupported_media_type",
                       "send the body as JSON with Content-Type: application/json")
    req = parse_body(request.get_data(cache=False), state().settings.max_rows)
    t_parsed = time.perf_counter()
    body, compute = predict_response(model, req, t_start, t_parsed)
    g.rows = len(body["results"])
    t = body["timing_ms"]
    t["total"] = round((time.perf_counter() - t_start) * 1e3, 4)
    metrics.count_request(g.model_labels, body["results"], compute, t["total"] / 1e3)
    headers = {
        "Server-Timing": f"parse;dur={t['parse']}, compute;dur={t['compute']}, "
                         f"total;dur={t['total']}",
        "X-Model-Version": str(model.version),
    }
    return json_response(body, 200, headers)
