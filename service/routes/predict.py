"""The predict route: pick the model version, parse the rows, answer, count."""

from __future__ import annotations

from time import perf_counter

import orjson
from flask import Blueprint, Response, request

from service import metrics
from service.access_log import LABELS, ROWS
from service.answers import parse_body, predict_response
from service.app_state import state
from service.errors import ApiError
from service.model import Model
from service.routes import model_name, not_found
from service.store import NotFound, StoreError

bp = Blueprint("predict", __name__)


def sends_json(environ: dict) -> bool:
    """Content-Type is application/json or a +json type (werkzeug's rule, without the cost)."""
    mime = environ.get("CONTENT_TYPE", "").split(";", 1)[0].strip().lower()
    return mime == "application/json" or (mime.startswith("application/")
                                           and mime.endswith("+json"))


def chosen_model(name: str, environ: dict) -> Model:
    """The live version, or the one ``?version=N`` pins."""
    models = state().models
    # request.args parses even an empty query string; most calls have none
    pinned = request.args.get("version") if environ.get("QUERY_STRING") else None
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
    t_start = perf_counter()
    environ = request.environ
    name = model_name(name)
    model = chosen_model(name, environ)
    version = str(model.version)
    environ[LABELS] = labels = (name, version)
    if not sends_json(environ):
        raise ApiError(415, "unsupported_media_type",
                       "send the body as JSON with Content-Type: application/json")
    req = parse_body(request.get_data(cache=False), state().settings.max_rows)
    t_parsed = perf_counter()
    body, compute = predict_response(model, req, t_start, t_parsed)
    results = body["results"]
    environ[ROWS] = len(results)
    t = body["timing_ms"]
    t["total"] = total = round((perf_counter() - t_start) * 1e3, 4)
    metrics.count_request(labels, results, compute, total / 1e3)
    # a list in wire order with Content-Type in it: werkzeug then skips its mimetype work
    # and its dict-to-Headers copy (the same headers as json_response would send)
    return Response(orjson.dumps(body, option=orjson.OPT_SERIALIZE_NUMPY), 200, [
        ("Server-Timing", f"parse;dur={t['parse']}, compute;dur={t['compute']}, "
                          f"total;dur={total}"),
        ("X-Model-Version", version),
        ("Content-Type", "application/json"),
    ])
