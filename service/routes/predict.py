"""The predict route: pick the model version, parse the rows, answer, count.

Two ways in, one answer. The Flask view serves every request. :class:`PredictShortcut`, a
WSGI layer in front of Flask, answers the common request — POST with a JSON body of known
length, no query, a live model already loaded — by the same :func:`answer` without Flask's
per-request machinery (request and app contexts, URL matching, the Request and Response
objects: about 100 µs of Python a request on a 2-core VM). Anything else, and any
request whose answer would not be a 200, goes to Flask, so routing, errors, their bodies
and their counting stay Flask's alone; a body the shortcut refused is not parsed again:
the refusal goes along (:data:`REFUSED`) and the view raises it where it would have.
Both read the body through :func:`service.request_body.read_body` (the byte limit, chunked
bodies included).
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterable
from time import perf_counter

import orjson
from flask import Blueprint, Response, request

from service import idle, metrics, traffic
from service.access_log import LABELS, ROUTE, ROWS
from service.answers import COMPUTE_SLOT, parse_body, predict_response
from service.app_state import AppState, state
from service.errors import ApiError
from service.model import Model
from service.request_body import read_body
from service.routes import model_name, not_found
from service.store import NotFound, StoreError, check_version
from service.store.names import valid_name

bp = Blueprint("predict", __name__)
RULE = "/models/<name>/predict"
#: Environ key of the exception the shortcut met answering a request it then left to Flask.
REFUSED = "kridge.refused"


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
        try:
            version = check_version(pinned)
        except StoreError as exc:
            raise ApiError(400, "invalid_version", str(exc)) from None
        return models.pinned_version(name, version)
    except NotFound as exc:
        raise not_found(name, exc) from None
    except StoreError as exc:
        raise ApiError(404, "version_unavailable", str(exc)) from None


def answer(name: str, model: Model, raw: bytes, max_rows: int, t_start: float,
           environ: dict) -> tuple[bytes, list[tuple[str, str]]]:
    """The 200 answer to body ``raw`` for ``model``: JSON bytes and headers, counted in the
    metrics; ApiError when the body is refused. Leaves the access log's labels and row
    count in ``environ``."""
    version = str(model.version)
    environ[LABELS] = labels = (name, version)
    idle.started()  # the shadow keeps off the slot while requests come (service/idle.py)
    try:
        with COMPUTE_SLOT:  # one request of this worker at a time; the socket work is outside
            req = parse_body(raw, max_rows, model.features, model.encoding.any)
            t_parsed = perf_counter()
            body, compute = predict_response(model, req, t_start, t_parsed)
            results = body["results"]
            environ[ROWS] = len(results)
            t = body["timing_ms"]
            t["total"] = total = round((perf_counter() - t_start) * 1e3, 4)
            payload = orjson.dumps(body, option=orjson.OPT_SERIALIZE_NUMPY)
    finally:
        idle.finished()
    metrics.count_request(labels, results, compute, total / 1e3)  # last: nothing can fail
    traffic.after_answer(name, model, req, results, environ)  # drift window, shadow queue
    # wire order; with Content-Type in the list werkzeug skips its mimetype work
    return payload, [
        ("Server-Timing", f"parse;dur={t['parse']}, compute;dur={t['compute']}, "
                          f"total;dur={total}"),
        ("X-Model-Version", version),
        ("Content-Type", "application/json"),
    ]


@bp.post(RULE)
def predict(name: str):
    t_start = perf_counter()
    environ = request.environ
    name = model_name(name)
    model = chosen_model(name, environ)
    environ[LABELS] = (name, str(model.version))  # an error answer is counted under them
    if not sends_json(environ):
        raise ApiError(415, "unsupported_media_type",
                       "send the body as JSON with Content-Type: application/json")
    refused = environ.pop(REFUSED, None)
    if refused is not None:  # the shortcut parsed this body already
        raise refused
    settings = state().settings
    payload, headers = answer(name, model, read_body(environ, settings.max_body_bytes),
                              settings.max_rows, t_start, environ)
    return Response(payload, 200, headers)


_PATH = re.compile(r"/models/([^/]+)/predict")  # the rule's path; <name> is werkzeug's [^/]+


class PredictShortcut:
    """WSGI layer in front of Flask answering the common predict request (module doc)."""

    def __init__(self, flask_wsgi: Callable, app_state: AppState):
        self.flask_wsgi = flask_wsgi
        self.state = app_state

    def __call__(self, environ: dict, start_response: Callable) -> Iterable[bytes]:
        if environ.get("REQUEST_METHOD") == "POST" and not environ.get("QUERY_STRING"):
            match = _PATH.fullmatch(environ.get("PATH_INFO", ""))
            if match is not None:
                done = self._answer(match.group(1), environ)
                if done is not None:
                    payload, headers = done
                    headers.append(("Content-Length", str(len(payload))))
                    start_response("200 OK", headers)
                    return [payload]
        return self.flask_wsgi(environ, start_response)

    def _answer(self, name: str, environ: dict) -> tuple[bytes, list] | None:
        """The answer, or None to leave the request to Flask (with the refusal, if any)."""
        t_start = perf_counter()
        # a name the store refuses, a model not loaded yet: Flask's 404s and loading
        if not valid_name(name) or not sends_json(environ):
            return None
        model = self.state.models.loaded(name)
        settings = self.state.settings
        length = environ.get("CONTENT_LENGTH", "")
        if (model is None or not length.isdigit() or int(length) > settings.max_body_bytes
                or environ.get("HTTP_TRANSFER_ENCODING")):
            return None
        try:
            raw = read_body(environ, settings.max_body_bytes)
            done = answer(name, model, raw, settings.max_rows, t_start, environ)
        except Exception as exc:  # Flask's view raises it again, unparsed, and answers it
            environ.pop(LABELS, None)
            environ.pop(ROWS, None)
            environ[REFUSED] = exc
            return None
        environ[ROUTE] = RULE
        return done
