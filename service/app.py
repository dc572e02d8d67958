"""The Flask application factory: every route of the service on one screen.

Routes and fields are fixed by the README's HTTP API. Handlers stay thin: request validation and
the answer's shape live in :mod:`service.predict`, models in :mod:`service.hub`, the store in
:mod:`service.store`.
"""

from __future__ import annotations

import hmac
import logging
import time

import orjson
from flask import Flask, Response, g, request
from pydantic import ValidationError
from werkzeug.exceptions import HTTPException

from service import access_log, drain, metrics
from service.bundle import verify
from service.errors import ApiError
from service.hub import ModelHub
from service.openapi import build_openapi, describe_served
from service.pages import pages
from service.predict import parse_body, predict_response
from service.schemas import ReleaseRequest
from service.settings import Settings
from service.store import NotFound, Store, StoreError, check_name

log = logging.getLogger("kridge.service")


def json_response(body, status: int = 200, headers: dict | None = None) -> Response:
    return Response(orjson.dumps(body, option=orjson.OPT_SERIALIZE_NUMPY), status=status,
                    headers=headers, content_type="application/json")


def sends_json(environ: dict) -> bool:
    """Content-Type is application/json or a +json type (werkzeug's rule, without the cost)."""
    mime = environ.get("CONTENT_TYPE", "").split(";", 1)[0].strip().lower()
    return mime == "application/json" or (mime.startswith("application/")
                                           and mime.endswith("+json"))


def create_app(settings: Settings | None = None, watch: bool = True) -> Flask:
    """Build the app; ``watch`` starts the live.json watcher thread (off in unit tests)."""
    settings = settings or Settings.from_env()
    app = Flask(__name__)
    app.config["MAX_CONTENT_LENGTH"] = settings.max_body_bytes
    store = Store(settings.store)
    hub = ModelHub(store, settings.pinned_cache,
                   on_load_failure=lambda n, v, _: metrics.LOAD_FAILURES.labels(n, str(v)).inc())
    if watch:
        hub.start(settings.poll_seconds)
    else:
        hub.refresh()
    app.extensions["kridge"] = {"hub": hub, "store": store, "settings": settings}
    access_log.install(app, settings.access_log)
    openapi_cache: dict[tuple, bytes] = {}

    def openapi_doc() -> bytes:
        """The document for the models served now (rebuilt when what is served changes)."""
        served = describe_served(store, hub)
        key = tuple(sorted(served.items()))
        if key not in openapi_cache:
            openapi_cache.clear()
            openapi_cache[key] = orjson.dumps(build_openapi(
                settings.max_rows, settings.max_body_bytes, served))
        return openapi_cache[key]

    def model_name(name: str) -> str:
        try:
            return check_name(name)
        except StoreError as exc:
            raise ApiError(404, "model_not_found", str(exc)) from None

    def not_found(name: str, exc: StoreError) -> ApiError:
        """404 for a lookup that failed; never the store's folder in the message."""
        if not store.model_dir(name).is_dir():
            return ApiError(404, "model_not_found", f"no model named {name!r}")
        return ApiError(404, "model_not_found", str(exc))

    # -- errors --------------------------------------------------------------------------
    @app.errorhandler(ApiError)
    def api_error(exc: ApiError):
        label = g.get("model_labels") or ((request.view_args or {}).get("name", ""), "")
        metrics.ERRORS.labels(label[0], label[1], exc.code).inc()
        return json_response(exc.body(), exc.status)

    @app.errorhandler(HTTPException)
    def http_error(exc: HTTPException):
        code = (exc.name or "error").lower().replace(" ", "_")
        message = {413: f"request body is larger than {settings.max_body_bytes} bytes "
                        "(KRIDGE_MAX_BODY_BYTES)"}.get(exc.code, exc.description or exc.name)
        response = api_error(ApiError(exc.code or 500, code, message))
        allowed = getattr(exc, "valid_methods", None)
        if exc.code == 405 and allowed:  # RFC 9110 §15.5.6: a 405 must list what is allowed
            response.headers["Allow"] = ", ".join(allowed)
        return response

    @app.errorhandler(Exception)
    def unexpected(exc: Exception):
        log.exception("unhandled error on %s %s", request.method, request.path)
        metrics.ERRORS.labels("", "", "internal").inc()
        return json_response({"error": {"code": "internal", "message": "internal error; "
                                        "see the service log", "details": None}}, 500)

    # -- discovery -----------------------------------------------------------------------
    @app.get("/healthz")
    def healthz():
        return json_response({"up": True})

    @app.get("/readyz")
    def readyz():
        ready, served, problems = hub.readiness()
        draining = drain.active()  # after SIGTERM: the balancer should send no more
        ready = ready and not draining
        return json_response({"ready": ready, "draining": draining, "models": served,
                              "problems": problems}, 200 if ready else 503)

    @app.get("/models")
    def list_models():
        out = []
        for name in store.models():
            try:
                out.append({"name": name, "live_version": store.live_version(name),
                            "versions": store.versions(name)})
            except StoreError as exc:
                log.warning("model %s skipped in listing: %s", name, exc)
        return json_response({"models": out})

    @app.get("/models/<name>")
    def describe(name: str):
        try:
            m = hub.live(model_name(name))
        except StoreError as exc:
            raise not_found(name, exc) from None
        man = m.manifest
        return json_response({
            "model": m.name, "version": m.version, "created": man.get("created"),
            "features": m.features, "targets": m.targets, "kernel": man["kernel"],
            "ridge": man["ridge"], "training_rows": man.get("training", {}).get("rows"),
            "metrics": man.get("metrics"), "ranges": man["envelope"]["ranges"],
            "novelty": man["envelope"]["novelty"],
            "intervals": m.has_intervals,
        })

    @app.get("/models/<name>/versions")
    def list_versions(name: str):
        name = model_name(name)
        try:
            live = store.live_version(name)
            versions = store.versions(name)
        except StoreError as exc:
            raise not_found(name, exc) from None
        rows = []
        for v in versions:
            try:
                man = store.read_manifest(name, v)
                rows.append({"version": v, "created": man.get("created"), "live": v == live,
                             "kernel": man["kernel"]["name"], "metrics": man.get("metrics")})
            except StoreError as exc:
                rows.append({"version": v, "created": None, "live": v == live, "kernel": None,
                             "metrics": None, "fault": str(exc)})
        return json_response({"model": name, "live_version": live, "versions": rows})

    @app.get("/openapi.json")
    def openapi():
        return Response(openapi_doc(), mimetype="application/json")

    @app.get("/metrics")
    def prometheus():
        body, ctype = metrics.exposition()
        return Response(body, content_type=ctype)

    # -- predict -------------------------------------------------------------------------
    @app.post("/models/<name>/predict")
    def predict(name: str):
        t_start = time.perf_counter()
        name = model_name(name)
        # request.args parses even an empty query string; most calls have none
        pinned = request.args.get("version") if request.environ.get("QUERY_STRING") else None
        try:
            if pinned is not None:
                if not pinned.isdigit() or int(pinned) < 1:
                    raise ApiError(400, "invalid_version",
                                   f"version must be a positive integer, got {pinned!r}")
                model = hub.pinned_version(name, int(pinned))
            else:
                model = hub.live(name)
        except NotFound as exc:
            raise not_found(name, exc) from None
        except StoreError as exc:
            raise ApiError(404, "version_unavailable", str(exc)) from None
        labels = (name, str(model.version))
        g.model_labels = labels
        if not sends_json(request.environ):
            raise ApiError(415, "unsupported_media_type",
                           "send the body as JSON with Content-Type: application/json")
        req = parse_body(request.get_data(cache=False), settings.max_rows)
        t_parsed = time.perf_counter()
        body, compute = predict_response(model, req, t_start, t_parsed)
        g.rows = len(body["results"])
        out_of_range = sum(1 for r in body["results"] if r["envelope"]["out_of_range"])
        novel = sum(1 for r in body["results"] if r["envelope"]["novel"])
        series = metrics.for_version(*labels)
        series.rows.inc(len(body["results"]))
        if out_of_range:
            series.out_of_range.inc(out_of_range)
        if novel:
            series.novel.inc(novel)
        series.compute.observe(compute)
        t = body["timing_ms"]
        t["total"] = round((time.perf_counter() - t_start) * 1e3, 4)
        series.request.observe(t["total"] / 1e3)
        headers = {
            "Server-Timing": f"parse;dur={t['parse']}, compute;dur={t['compute']}, "
                             f"total;dur={t['total']}",
            "X-Model-Version": str(model.version),
        }
        return json_response(body, 200, headers)

    # -- admin ---------------------------------------------------------------------------
    def require_admin() -> None:
        token = settings.admin_token
        if not token:
            raise ApiError(403, "admin_disabled",
                           "admin routes are disabled: set KRIDGE_ADMIN_TOKEN to enable them")
        given = request.headers.get("Authorization", "")
        scheme, _, value = given.partition(" ")
        if scheme.lower() != "bearer" or not hmac.compare_digest(
            value.strip().encode(), token.encode()
        ):
            raise ApiError(401, "unauthorized", "missing or wrong bearer token")

    def check(name: str):
        def run(version: int) -> None:
            verify(store, name, version)
        return run

    @app.post("/models/<name>/release")
    def release(name: str):
        require_admin()
        name = model_name(name)
        try:
            body = ReleaseRequest.model_validate(orjson.loads(request.get_data() or b"null"))
        except (orjson.JSONDecodeError, ValidationError):
            raise ApiError(422, "invalid_request",
                           'send {"version": N} with N a positive integer') from None
        try:
            rec = store.release(name, body.version, check=check(name))
        except NotFound as exc:
            raise not_found(name, exc) from None
        except StoreError as exc:
            log.warning("model %s: release of version %s refused: %s", name, body.version, exc)
            raise ApiError(409, "version_refused", str(exc)) from None
        return json_response({"model": name, **rec})

    @app.post("/models/<name>/rollback")
    def rollback(name: str):
        require_admin()
        name = model_name(name)
        try:
            rec = store.rollback(name, check=check(name))
        except NotFound as exc:
            raise not_found(name, exc) from None
        except StoreError as exc:  # nothing earlier, damaged history, or a refused version
            raise ApiError(409, "rollback_refused", str(exc)) from None
        return json_response({"model": name, **rec})

    app.register_blueprint(pages)
    return app
