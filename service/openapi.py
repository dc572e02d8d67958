"""OpenAPI 3.1 document, generated from the pydantic classes in :mod:`service.schemas`."""

from __future__ import annotations

from pydantic.json_schema import models_json_schema

from service import schemas as s

REF = "#/components/schemas/{model}"


def _json(name: str) -> dict:
    return {"content": {"application/json": {"schema": {"$ref": REF.format(model=name)}}}}


def _resp(desc: str, name: str | None = None) -> dict:
    out = {"description": desc}
    if name:
        out.update(_json(name))
    return out


def _model_rows(features: list[str]) -> dict:
    """Row schema of one model: every feature by name, or exactly that many numbers."""
    number = {"type": "number"}
    return {"anyOf": [
        {"type": "object", "properties": {f: number for f in features},
         "required": list(features), "additionalProperties": False},
        {"type": "array", "items": number, "minItems": len(features),
         "maxItems": len(features), "description": "In this order: " + ", ".join(features)},
    ]}


def build_openapi(max_rows: int, max_body: int, models: dict[str, list[str]] | None = None
                  ) -> dict:
    """The whole document; limits are stated in the predict operation's description.

    ``models`` maps each model served now to its features: each gets its own predict path
    with the exact row shape (OpenAPI matches a concrete path before a templated one), so
    a request the document accepts is one the service answers with predictions.
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
    name = {"name": "name", "in": "path", "required": True, "schema": {"type": "string"}}
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
        "/models/{name}/predict": {"post": {
            "summary": "Predict with the live version (or a pinned one)",
            "description": f"At most {max_rows} rows and {max_body} bytes per request. Every "
                           "answer carries Server-Timing and X-Model-Version headers. Results "
                           "outside the training envelope are extrapolations.",
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
    for model, features in sorted((models or {}).items()):
        rows = dict(defs["RowBatch"]["properties"]["rows"], items=_model_rows(features))
        body = dict(defs["RowBatch"], properties=dict(defs["RowBatch"]["properties"], rows=rows))
        paths[f"/models/{model}/predict"] = {"post": {
            "summary": f"Predict with model {model}",
            "description": paths["/models/{name}/predict"]["post"]["description"],
            "operationId": f"predict_{model}", "parameters": [version_query],
            "requestBody": {"required": True, "content": {"application/json": {
                "schema": body}}},
            "responses": {"200": predicted, **err}}}
    return {
        "openapi": "3.1.0",
        "info": {
            "title": "kridge prediction service",
            "version": "1",
            "description": "Kernel ridge regression predictions with training-envelope flags. "
                           "Predictions outside the envelope are extrapolations; follow site "
                           "procedures and qualified review before acting on them.",
        },
        "paths": paths,
        "components": {
            "schemas": defs,
            "securitySchemes": {"bearer": {"type": "http", "scheme": "bearer"}},
        },
    }
