"""OpenAPI 3.1 document, generated from the pydantic classes in :mod:`service.schemas`."""

from __future__ import annotations

from dataclasses import dataclass

from pydantic.json_schema import models_json_schema

from service import schemas as s
from service.cautions import BEFORE_ACTING
from service.intervals import largest_coverage
from service.store import NAME_RE, StoreError

REF = "#/components/schemas/{model}"


def _json(name: str) -> dict:
    return {"content": {"application/json": {"schema": {"$ref": REF.format(model=name)}}}}


def _resp(desc: str, name: str | None = None) -> dict:
    out = {"description": desc}
    if name:
        out.update(_json(name))
    return out


@dataclass(frozen=True)
class ServedModel:
    """What the document needs to know of one served model."""

    features: tuple[str, ...]
    versions: tuple[int, ...]  # versions taking the same rows and coverage as the live one
    calibration: int | None  # calibration residuals behind ``coverage``; None: no intervals


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
                man = store.read_manifest(name, v)
                res = man.get("arrays", {}).get("abs_residuals")
                c = int(res["shape"][0]) if res else None
                if list(man.get("features", [])) == model.features and c == own:
                    same.append(v)
            except (StoreError, KeyError, TypeError, ValueError, IndexError):
                continue
        out[name] = ServedModel(tuple(model.features), tuple(same or [model.version]), own)
    return out


def _model_body(batch: dict, served: ServedModel) -> dict:
    """The request schema of one model: every feature by name, or exactly that many numbers
    in feature order; ``coverage`` only when the model has intervals, up to what they allow."""
    number = batch["properties"]["rows"]["items"]["anyOf"][0]["additionalProperties"]
    rows = dict(batch["properties"]["rows"], items={"anyOf": [
        {"type": "object", "properties": {f: number for f in served.features},
         "required": list(served.features), "additionalProperties": False},
        {"type": "array", "items": number, "minItems": len(served.features),
         "maxItems": len(served.features),
         "description": "In this order: " + ", ".join(served.features)},
    ]})
    props = {"rows": rows}
    if served.calibration is not None:
        props["coverage"] = {"anyOf": [
            {"type": "number", "exclusiveMinimum": 0,
             "maximum": largest_coverage(served.calibration)},
            {"type": "null"}], "description": batch["properties"]["coverage"]["description"]}
    return dict(batch, properties=props)


def build_openapi(max_rows: int, max_body: int, models: dict[str, ServedModel] | None = None
                  ) -> dict:
    """The whole document; limits are stated in the predict operation's description.

    ``models`` (see :func:`describe_served`) gives each model served now its own predict
    path with the exact row shape, in place of the templated one, so that a request the
    document accepts is one the service answers with predictions. With no model served the
    templated path stays, with the shape every model shares.
    """
    _, defs = models_json_schema(
        [(m, "validation") for m in (
            s.RowBatch, s.PredictionBatch, s.ErrorResponse, s.ReleaseRequest,
            s.ReleaseResponse, s.VersionsResponse, s.ModelsResponse, s.ModelSummary,
            s.Health, s.Readiness,
        )],
        ref_template=REF,
    )
    defs = defs.get("$defs", {})
    defs["RowBatch"]["properties"]["rows"]["maxItems"] = max_rows
    err = {code: _resp(text, "ErrorResponse") for code, text in (
        ("400", "Malformed JSON or a bad query parameter"),
        ("404", "No such model or version"),
        ("413", "Body or row count over the limit"),
        ("415", "Body is not application/json"),
        ("422", "Request does not fit the model (names row and feature)"),
    )}
    models = models or {}
    name_schema: dict = {"type": "string", "pattern": f"^{NAME_RE.pattern}$"}
    name = {"name": "name", "in": "path", "required": True, "schema": name_schema}
    admin = [{"bearer": []}]
    admin_err = {
        "401": _resp("Missing or wrong bearer token", "ErrorResponse"),
        "403": _resp("Admin routes disabled (no KRIDGE_ADMIN_TOKEN)", "ErrorResponse"),
        "404": err["404"], "422": err["422"],
        "409": _resp("Valid, but the store's state does not allow it (the version fails "
                     "verification, nothing earlier to roll back to, damaged history)",
                     "ErrorResponse"),
    }
    predicted = {"description": "Predictions", **_json("PredictionBatch"), "headers": {
        "Server-Timing": {"description": "parse, compute and total milliseconds",
                          "schema": {"type": "string"}},
        "X-Model-Version": {"description": "The version that answered",
                            "schema": {"type": "string", "pattern": "^[1-9][0-9]*$"}},
    }}
    version_query = {"name": "version", "in": "query", "required": False,
                     "schema": {"type": "integer", "minimum": 1, "maximum": s.MAX_VERSION}}
    predict_text = (f"At most {max_rows} rows and {max_body} bytes per request. Every answer "
                    "carries Server-Timing and X-Model-Version headers. Results outside the "
                    "training envelope are extrapolations.")
    paths = {
        "/healthz": {"get": {"summary": "Process is up", "operationId": "health",
                             "responses": {"200": _resp("Up", "Health")}}},
        "/readyz": {"get": {"summary": "Every live model is loaded", "operationId": "ready",
                            "responses": {"200": _resp("Ready", "Readiness"),
                                          "503": _resp("Not ready", "Readiness")}}},
        "/models": {"get": {"summary": "Models with live version and versions",
                            "operationId": "listModels",
                            "responses": {"200": _resp("Models", "ModelsResponse")}}},
        "/models/{name}": {"get": {
            "summary": "Live version's manifest summary", "operationId": "describeModel",
            "parameters": [name],
            "responses": {"200": _resp("Summary", "ModelSummary"), "404": err["404"]}}},
        "/models/{name}/versions": {"get": {
            "summary": "Versions with created time, metrics and live marker",
            "operationId": "listVersions", "parameters": [name],
            "responses": {"200": _resp("Versions", "VersionsResponse"), "404": err["404"]}}},
        "/models/{name}/versions/{version}/report": {"get": {
            "summary": "A version's training report (read-only HTML from the store)",
            "description": "The report file the trainer wrote beside the version's manifest; "
                           "the request names a model and a version, never a file.",
            "operationId": "versionReport",
            "parameters": [name, {"name": "version", "in": "path", "required": True,
                                  "schema": {"type": "integer", "minimum": 1,
                                             "maximum": s.MAX_VERSION}}],
            "responses": {"200": {"description": "The report", "content": {
                "text/html": {"schema": {"type": "string"}}}},
                "404": _resp("No such model or version, or the version has no report",
                             "ErrorResponse")}}},
        "/models/{name}/predict": {"post": {
            "summary": "Predict with the live version (or a pinned one)",
            "description": predict_text,
            "operationId": "predict",
            "parameters": [name, version_query],
            "requestBody": {"required": True, **_json("RowBatch")},
            "responses": {"200": predicted, **err}}},
        "/models/{name}/release": {"post": {
            "summary": "Make a version live (admin)", "operationId": "release",
            "parameters": [name], "security": admin,
            "requestBody": {"required": True, **_json("ReleaseRequest")},
            "responses": {"200": _resp("Released", "ReleaseResponse"), **admin_err}}},
        "/models/{name}/rollback": {"post": {
            "summary": "Make the previously live version live again (admin)",
            "operationId": "rollback", "parameters": [name], "security": admin,
            "responses": {"200": _resp("Rolled back", "ReleaseResponse"), **admin_err}}},
        "/metrics": {"get": {"summary": "Prometheus text exposition", "operationId": "metrics",
                             "responses": {"200": {"description": "Metrics", "content": {
                                 "text/plain": {"schema": {"type": "string"}}}}}}},
        "/openapi.json": {"get": {"summary": "This document", "operationId": "openapi",
                                  "responses": {"200": {"description": "OpenAPI 3.1",
                                                        "content": {"application/json": {
                                                            "schema": {"type": "object"}}}}}}},
    }
    if models:  # each served model has its own path; the template would promise too much
        del paths["/models/{name}/predict"]
    for model, served in sorted(models.items()):
        pinned = {"name": "version", "in": "query", "required": False,
                  "schema": {"type": "integer", "enum": list(served.versions)}}
        paths[f"/models/{model}/predict"] = {"post": {
            "summary": f"Predict with model {model}",
            "description": predict_text,
            "operationId": f"predict_{model}", "parameters": [pinned],
            "requestBody": {"required": True, "content": {"application/json": {
                "schema": _model_body(defs["RowBatch"], served)}}},
            "responses": {"200": predicted, **err}}}
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
