"""What a caller or a balancer can ask about the service: probes, models, versions, the
OpenAPI document and the Prometheus metrics."""

from __future__ import annotations

import logging

from flask import Blueprint, Response

from service import drain, metrics
from service import schemas as s
from service.app_state import state
from service.routes import model_name, model_response, not_found
from service.store import StoreError
from service.target_kernels import kernel_names, shared_entries

log = logging.getLogger("kridge.service")
bp = Blueprint("discovery", __name__)


@bp.get("/healthz")
def healthz():
    return model_response(s.Health(up=True))


@bp.get("/readyz")
def readyz():
    ready, served, problems = state().models.readiness()
    draining = drain.active()  # after SIGTERM: the balancer should send no more
    ready = ready and not draining
    return model_response(s.Readiness(ready=ready, draining=draining, models=served,
                                      problems=problems), 200 if ready else 503)


@bp.get("/models")
def list_models():
    store = state().store
    out = []
    for name in store.models():
        try:
            out.append(s.ModelEntry(name=name, live_version=store.live_version(name),
                                    versions=store.versions(name)))
        except StoreError as exc:
            log.warning("model %s skipped in listing: %s", name, exc)
    return model_response(s.ModelsResponse(models=out))


@bp.get("/models/<name>")
def describe(name: str):
    try:
        m = state().models.live(model_name(name))
    except StoreError as exc:
        raise not_found(name, exc) from None
    man = m.manifest
    shared = shared_entries(m.target_kernels)
    return model_response(s.ModelSummary(
        model=m.name, version=m.version, created=man.get("created"),
        features=m.features, targets=m.targets, kernel=shared["kernel"],
        ridge=shared["ridge"], per_target=shared["per_target"],
        training_rows=man.get("training", {}).get("rows"),
        metrics=man.get("metrics"), ranges=man["envelope"]["ranges"],
        novelty=man["envelope"]["novelty"],
        shape_check=man["envelope"].get("pca"),
        target_ranges=man["envelope"].get("target_ranges"),
        target_bounds=(man.get("target_bounds") or {}).get("bounds"),
        intervals=m.has_intervals,
    ))


@bp.get("/models/<name>/versions")
def list_versions(name: str):
    store = state().store
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
            rows.append(s.VersionInfo(version=v, created=man.get("created"), live=v == live,
                                      kernel=kernel_names(man), metrics=man.get("metrics")))
        except StoreError as exc:
            rows.append(s.VersionInfo(version=v, created=None, live=v == live, kernel=None,
                                      metrics=None, fault=str(exc)))
    return model_response(s.VersionsResponse(model=name, live_version=live, versions=rows))


@bp.get("/openapi.json")
def openapi():
    return Response(state().openapi_doc(), mimetype="application/json")


@bp.get("/metrics")
def prometheus():
    body, ctype = metrics.exposition()
    return Response(body, content_type=ctype)
