"""OpenAPI 3.1 document. Every schema in it is generated from the pydantic classes of
:mod:`service.schemas` (``model_json_schema`` with references into
``#/components/schemas``): requests in pydantic's validation mode, answers in its
serialization mode, the classes the routes build their answers with."""

from __future__ import annotations

from dataclasses import dataclass

from pydantic import BaseModel
from pydantic.json_schema import models_json_schema

from service import schemas as s
from service.cautions import BEFORE_ACTING
from service.intervals import coverage_limit, largest_coverage
from service.store import NAME_RE, StoreError

REF = "#/components/schemas/{model}"

#: Request bodies: what the service accepts.
REQUESTS: tuple[type[BaseModel], ...] = (s.RowBatch, s.ReleaseRequest)
#: Answers: what the routes build (the predict answer is held to its schema by a test).
ANSWERS: tuple[type[BaseModel], ...] = (
    s.Health, s.Readiness, s.ModelsResponse, s.ModelSummary, s.VersionsResponse,
    s.PredictionBatch, s.ReleaseResponse, s.ErrorResponse,
)

#: Error statuses of the model routes, with what each means.
ERRORS = {
    "400": "Malformed JSON or a bad query parameter",
    "404": "No such model or version",
    "408": "Body not sent whole within the worker's deadline (10 s after the headers)",
    "413": "Body or row count over the limit",
    "415": "Body is not application/json",
    "422": "Request does not fit the model (names row and feature)",
}


def _json(model: type[BaseModel]) -> dict:
    return {"content": {"application/json": {
        "schema": {"$ref": REF.format(model=model.__name__)}}}}


def _resp(desc: str, model: type[BaseModel] | None = None) -> dict:
    return {"description": desc, **(_json(model) if model else {})}


def _error(code: str, desc: str | None = None) -> dict:
    return {code: _resp(desc or ERRORS[code], s.ErrorResponse)}


@dataclass(frozen=True)
class ServedModel:
    """What the document needs to know of one served model."""

    features: tuple[str, ...]
    versions: tuple[int, ...]  # versions taking the same rows and coverage as the live one
    calibration: int | None  # calibration residuals behind ``coverage``; None: no intervals
    categories: tuple[tuple[str, tuple[str, ...]], ...] = ()  # text features' categories


def _calibration_size(store, name: str, version: int) -> int | None:
    res = store.read_manifest(name, version).get("arrays", {}).get("abs_residuals")
    return int(res["shape"][0]) if res else None


def describe_served(store, live) -> dict[str, ServedModel]:
    """Every model this worker serves, with the versions that share the live one's shape."""
    out = {}
    for name, slot in list(live.slots.items()):
        model = slot.model
        if model is None:
            continue
        own = model.residuals.shape[0] if model.has_intervals else None
        same = []
        try:
            versions = store.versions(name)
        except StoreError:
            versions = [model.version]
        for v in versions:
            try:
                features = list(store.read_manifest(name, v).get("features", []))
                if features == model.features and _calibration_size(store, name, v) == own:
                    same.append(v)
            except (StoreError, KeyError, TypeError, ValueError, IndexError):
                continue
        text = tuple((f, tuple(c)) for f, c in model.encoding.categories.items())
        out[name] = ServedModel(tuple(model.features), tuple(same or [model.version]), own,
                                text)
    return out


def component_schemas(max_rows: int) -> dict:
    """The schemas of :data:`REQUESTS` and :data:`ANSWERS` and every class they use."""
    _, defs = models_json_schema(
        [(m, "validation") for m in REQUESTS] + [(m, "serialization") for m in ANSWERS],
        ref_template=REF,
    )
    defs = defs.get("$defs", {})
    batch = defs["RowBatch"]["properties"]
    batch["rows"]["maxItems"] = max_rows
    batch["ids"]["anyOf"][0]["maxItems"] = max_rows
    return defs


def _model_body(batch: dict, served: ServedModel) -> dict:
    """The request schema of one model: every feature by name, or exactly that many numbers
    in feature order; ``ids`` as for every model; ``coverage`` only when the model has
    intervals, up to what they allow (the rule of :func:`service.intervals.coverage_limit`,
    which the service applies)."""
    number = batch["properties"]["rows"]["items"]["anyOf"][0]["additionalProperties"]
    text = {f: {"type": "string", "maxLength": 200,
                "description": f"Category, one of: {', '.join(c)} (another is answered, "
                               "flagged outside the envelope)."}
            for f, c in served.categories}
    rows = dict(batch["properties"]["rows"], items={"anyOf": [
        {"type": "object", "properties": {f: text.get(f, number) for f in served.features},
         "required": list(served.features), "additionalProperties": False},
        {"type": "array", "items": {"anyOf": [number, {"type": "string", "maxLength": 200}]}
         if text else number, "minItems": len(served.features),
         "maxItems": len(served.features),
         "description": "In this order: " + ", ".join(served.features)},
    ]})
    props = {"rows": rows, "ids": batch["properties"]["ids"]}
    if served.calibration is not None:
        c = served.calibration
        props["coverage"] = {"anyOf": [
            {"type": "number", "exclusiveMinimum": 0, "maximum": largest_coverage(c)},
            {"type": "null"}],
            "description": f"{batch['properties']['coverage']['description']} This model's "
                           f"{coverage_limit(c)}."}
    return dict(batch, properties=props)


def _probe_paths() -> dict:
    """Probes, discovery of the service itself, metrics."""
    return {
        "/healthz": {"get": {"summary": "Process is up", "operationId": "health",
                             "responses": {"200": _resp("Up", s.Health)}}},
        "/readyz": {"get": {"summary": "Every live model is loaded and no drain is running",
                            "operationId": "ready",
                            "responses": {"200": _resp("Ready", s.Readiness),
                                          "503": _resp("Not ready", s.Readiness)}}},
        "/models": {"get": {"summary": "Models with live version and versions",
                            "operationId": "listModels",
                            "responses": {"200": _resp("Models", s.ModelsResponse)}}},
        "/metrics": {"get": {"summary": "Prometheus text exposition", "operationId": "metrics",
                             "responses": {"200": {"description": "Metrics", "content": {
                                 "text/plain": {"schema": {"type": "string"}}}}}}},
        "/openapi.json": {"get": {"summary": "This document", "operationId": "openapi",
                                  "responses": {"200": {"description": "OpenAPI 3.1",
                                                        "content": {"application/json": {
                                                            "schema": {"type": "object"}}}}}}},
    }


def _version_param(where: str, required: bool) -> dict:
    return {"name": "version", "in": where, "required": required,
            "schema": {"type": "integer", "minimum": 1, "maximum": s.MAX_VERSION}}


def _model_paths(name: dict) -> dict:
    """What one model's routes tell: summary, versions, a version's report."""
    return {
        "/models/{name}": {"get": {
            "summary": "Live version's manifest summary", "operationId": "describeModel",
            "parameters": [name],
            "responses": {"200": _resp("Summary", s.ModelSummary), **_error("404")}}},
        "/models/{name}/versions": {"get": {
            "summary": "Versions with created time, metrics and live marker",
            "operationId": "listVersions", "parameters": [name],
            "responses": {"200": _resp("Versions", s.VersionsResponse), **_error("404")}}},
        "/models/{name}/versions/{version}/report": {"get": {
            "summary": "A version's training report (read-only HTML from the store)",
            "description": "The report file the trainer wrote beside the version's manifest; "
                           "the request names a model and a version, never a file.",
            "operationId": "versionReport",
            "parameters": [name, _version_param("path", True)],
            "responses": {"200": {"description": "The report", "content": {
                "text/html": {"schema": {"type": "string"}}}},
                **_error("404", "No such model or version, or the version has no report")}}},
    }


def _admin_paths(name: dict) -> dict:
    """Release and rollback, behind the bearer token."""
    refused = {
        **_error("401", "Missing or wrong bearer token"),
        **_error("403", "Admin routes disabled (no KRIDGE_ADMIN_TOKEN)"),
        **_error("404"), **_error("422"),
        **_error("409", "Valid, but the store's state does not allow it (the version fails "
                        "verification, nothing earlier to roll back to, damaged history)"),
        **_error("503", "This service cannot write the store (a read-only mount, no write "
                        "permission, a full disk); nothing was changed"),
    }
    admin = [{"bearer": []}]
    return {
        "/models/{name}/release": {"post": {
            "summary": "Make a version live (admin)", "operationId": "release",
            "parameters": [name], "security": admin,
            "requestBody": {"required": True, **_json(s.ReleaseRequest)},
            "responses": {"200": _resp("Released", s.ReleaseResponse), **refused}}},
        "/models/{name}/rollback": {"post": {
            "summary": "Make the previously live version live again (admin)",
            "operationId": "rollback", "parameters": [name], "security": admin,
            "responses": {"200": _resp("Rolled back", s.ReleaseResponse), **refused}}},
    }


def _predict_op(summary: str, op_id: str, parameters: list, body: dict, text: str) -> dict:
    predicted = {"description": "Predictions", **_json(s.PredictionBatch), "headers": {
        "Server-Timing": {"description": "parse, compute and total milliseconds",
                          "schema": {"type": "string"}},
        "X-Model-Version": {"description": "The version that answered",
                            "schema": {"type": "string", "pattern": "^[1-9][0-9]*$"}},
    }}
    errors = {code: _resp(desc, s.ErrorResponse) for code, desc in ERRORS.items()}
    return {"post": {"summary": summary, "description": text, "operationId": op_id,
                     "parameters": parameters, "requestBody": {"required": True, **body},
                     "responses": {"200": predicted, **errors}}}


def _predict_paths(name: dict, text: str, defs: dict,
                   models: dict[str, ServedModel]) -> dict:
    """Each served model's own predict path with its exact row shape; with none served, the
    templated path with the shape every model shares (the template would promise too much
    once a model is served: rows of another model's shape)."""
    if not models:
        return {"/models/{name}/predict": _predict_op(
            "Predict with the live version (or a pinned one)", "predict",
            [name, _version_param("query", False)], _json(s.RowBatch), text)}
    paths = {}
    for model, served in sorted(models.items()):
        pinned = {"name": "version", "in": "query", "required": False,
                  "schema": {"type": "integer", "enum": list(served.versions)}}
        body = {"content": {"application/json": {"schema": _model_body(defs["RowBatch"],
                                                                        served)}}}
        paths[f"/models/{model}/predict"] = _predict_op(
            f"Predict with model {model}", f"predict_{model}", [pinned], body, text)
    return paths


def build_openapi(max_rows: int, max_body: int, models: dict[str, ServedModel] | None = None
                  ) -> dict:
    """The whole document; limits are stated in the predict operation's description.

    ``models`` (see :func:`describe_served`) gives each model served now its own predict
    path with the exact row shape, in place of the templated one, so that a request the
    document accepts is one the service answers with predictions.
    """
    defs = component_schemas(max_rows)
    name = {"name": "name", "in": "path", "required": True,
            "schema": {"type": "string", "pattern": f"^{NAME_RE.pattern}$"}}
    predict_text = (f"At most {max_rows} rows and {max_body} bytes per request. Every answer "
                    "carries Server-Timing and X-Model-Version headers. Results outside the "
                    "training envelope are extrapolations.")
    paths = {**_probe_paths(), **_model_paths(name), **_admin_paths(name),
             **_predict_paths(name, predict_text, defs, models or {})}
    return {
        "openapi": "3.1.0",
        "info": {
            "title": "kridge prediction service",
            "version": "1",
            "description": "Kernel ridge regression predictions with training-envelope flags. "
                           + BEFORE_ACTING,
        },
        "paths": paths,
        "components": {
            "schemas": defs,
            "securitySchemes": {"bearer": {"type": "http", "scheme": "bearer"}},
        },
    }
