"""The OpenAPI document against the service's real answers, and the coverage rule that HTTP,
``kridge predict`` and the document share.

A real gunicorn answers every route (successes and refusals); each JSON answer is validated
against the schema the served ``/openapi.json`` gives for its path, method and status, with
jsonschema's Draft 2020-12 validator (OpenAPI 3.1 schemas are JSON Schema 2020-12; jsonschema
4.26 here). The document itself is checked with openapi-spec-validator (0.9 here) against
its OpenAPI 3.1 schema.
"""

from __future__ import annotations

import csv
import math
import signal

import pytest
from cli_helpers import run_cli
from jsonschema import Draft202012Validator
from make_coating_data import EMPTY_REGION_ROW, TYPICAL_ROW
from openapi_spec_validator import OpenAPIV31SpecValidator
from service_helpers import Gunicorn, wait_for

from service.intervals import largest_coverage
from service.openapi import ANSWERS
from trainer.job import TrainOptions, train

TOKEN = "document-token-5c1e"
AUTH = {"Authorization": f"Bearer {TOKEN}"}
ROWS = 20  # calibration residuals of every model here (exact jackknife: one per row)


def _train(store, csv_path, name: str, targets: list[str], ridge: float, release: bool):
    train(TrainOptions(data=str(csv_path), targets=targets, name=name, kernel="rbf", gamma=0.2,
                       ridge=ridge, store=str(store), quiet=True, report=False,
                       features=list(TYPICAL_ROW), release=release),
          log=lambda *a, **k: None)


@pytest.fixture(scope="module")
def rows_csv(tmp_path_factory, demo_csv):
    path = tmp_path_factory.mktemp("data") / "rows.csv"
    path.write_text("\n".join(demo_csv.read_text().splitlines()[:ROWS + 1]) + "\n")
    return path


@pytest.fixture(scope="module")
def served(tmp_path_factory, rows_csv):
    """coat v1 (live) and v2, two targets; gloss v1, one target; admin token set."""
    root = tmp_path_factory.mktemp("document")
    store = root / "store"
    _train(store, rows_csv, "coat", ["hardness_s", "gloss_gu"], 0.1, True)
    _train(store, rows_csv, "coat", ["hardness_s", "gloss_gu"], 0.3, False)
    _train(store, rows_csv, "gloss", ["gloss_gu"], 0.1, True)
    env = {"KRIDGE_ADMIN_TOKEN": TOKEN, "KRIDGE_MAX_ROWS": "20", "KRIDGE_POLL_SECONDS": "0.1",
           "PROMETHEUS_MULTIPROC_DIR": str(root / "metrics")}
    with Gunicorn(store, workers=2, env=env) as g:
        g.store = store
        yield g


def _check(doc: dict, template: str, method: str, r) -> dict:
    """Validate answer ``r`` against the document's schema for its path, method and status;
    returns the body."""
    responses = doc["paths"][template][method]["responses"]
    assert str(r.status_code) in responses, (template, method, r.status_code, r.text)
    schema = responses[str(r.status_code)]["content"]["application/json"]["schema"]
    assert r.headers["Content-Type"].startswith("application/json")
    body = r.json()
    validator = Draft202012Validator(dict(schema, components=doc["components"]))
    errors = [f"{list(e.absolute_path)}: {e.message}" for e in validator.iter_errors(body)]
    assert not errors, (template, method, r.status_code, errors, body)
    return body


def _closed(schemas: dict, name: str, seen: set[str]) -> list[str]:
    """Object schemas reachable from component ``name`` that leave fields undeclared."""
    if name in seen:
        return []
    seen.add(name)
    open_ones, stack = [], [schemas[name]]
    while stack:
        node = stack.pop()
        if isinstance(node, list):
            stack.extend(node)
        elif isinstance(node, dict):
            ref = node.get("$ref", "")
            if ref:
                open_ones += _closed(schemas, ref.rsplit("/", 1)[-1], seen)
            if node.get("type") == "object" and "properties" in node and \
                    "additionalProperties" not in node:
                open_ones.append(f"{name}: {sorted(node['properties'])}")
            stack.extend(node.values())
    return open_ones


def test_document_is_valid_openapi_and_closes_every_answer(served):
    doc = served.get("/openapi.json").json()
    OpenAPIV31SpecValidator(doc).validate()  # reference: openapi-spec-validator 0.9, 3.1
    schemas = doc["components"]["schemas"]
    # every answer class is in the document, and none lets a field through undeclared: a
    # field a route sends is one the document names (GET /readyz once sent "draining")
    assert {m.__name__ for m in ANSWERS} <= set(schemas)
    seen: set[str] = set()
    assert [o for m in ANSWERS for o in _closed(schemas, m.__name__, seen)] == []
    assert set(schemas["Readiness"]["properties"]) == {"ready", "draining", "models",
                                                       "problems"}


def test_every_discovery_answer_fits_the_document(served):
    doc = served.get("/openapi.json").json()
    assert _check(doc, "/healthz", "get", served.get("/healthz")) == {"up": True}
    ready = _check(doc, "/readyz", "get", served.get("/readyz"))
    assert ready["ready"] is True and ready["draining"] is False
    listed = _check(doc, "/models", "get", served.get("/models"))
    assert {m["name"] for m in listed["models"]} == {"coat", "gloss"}
    summary = _check(doc, "/models/{name}", "get", served.get("/models/coat"))
    assert summary["kernel"] == {"name": "rbf", "params": {"gamma": 0.2}}
    versions = _check(doc, "/models/{name}/versions", "get", served.get("/models/coat/versions"))
    assert [v["version"] for v in versions["versions"]] == [1, 2]
    assert all("fault" not in v for v in versions["versions"])  # only where a manifest fails
    for template, path in (("/models/{name}", "/models/nope"),
                           ("/models/{name}/versions", "/models/nope/versions"),
                           ("/models/{name}/versions/{version}/report",
                            "/models/coat/versions/1/report")):  # trained without a report
        r = served.get(path)
        assert r.status_code == 404
        _check(doc, template, "get", r)


def test_every_predict_answer_fits_the_document(served):
    doc = served.get("/openapi.json").json()
    coat, gloss = "/models/coat/predict", "/models/gloss/predict"
    both = _check(doc, coat, "post", served.post(coat, json={"rows": [TYPICAL_ROW],
                                                             "coverage": 0.9}))
    assert len(both["results"][0]["interval"]) == 2 and "caution" not in both
    outside = _check(doc, coat, "post", served.post(coat, json={
        "rows": [EMPTY_REGION_ROW, list(TYPICAL_ROW.values())]}))
    assert outside["caution"] and "interval" not in outside["results"][0]
    pinned = _check(doc, coat, "post", served.post(coat, params={"version": "2"},
                                                   json={"rows": [TYPICAL_ROW]}))
    assert pinned["version"] == 2
    one = _check(doc, gloss, "post", served.post(gloss, json={"rows": [TYPICAL_ROW],
                                                              "coverage": 0.5}))
    assert isinstance(one["results"][0]["value"], float)
    # row ids come back in the results, in a field the document declares
    body = doc["paths"][coat]["post"]["requestBody"]["content"]["application/json"]["schema"]
    assert body["properties"]["ids"]["anyOf"][0]["items"]["type"] == "string"
    tagged = _check(doc, coat, "post", served.post(coat, json={
        "rows": [TYPICAL_ROW, EMPTY_REGION_ROW], "ids": ["s-1", "s-2"], "coverage": 0.9}))
    assert [r["id"] for r in tagged["results"]] == ["s-1", "s-2"]
    assert "id" not in both["results"][0]
    refusals = [
        (422, dict(json={"rows": [TYPICAL_ROW], "ids": ["s-1", "s-2"]})),
        (422, dict(json={"rows": [TYPICAL_ROW], "ids": [7]})),
        (400, dict(data=b"{", headers={"Content-Type": "application/json"})),
        (404, dict(params={"version": "9"}, json={"rows": [TYPICAL_ROW]})),
        (413, dict(json={"rows": [TYPICAL_ROW] * 21})),
        (415, dict(data=b"rows", headers={"Content-Type": "text/plain"})),
        (422, dict(json={"rows": [[1.0]]})),
        (422, dict(json={"rows": [TYPICAL_ROW], "coverage": 0.99})),
    ]
    for status, kw in refusals:
        r = served.post(coat, **kw)
        assert r.status_code == status, (kw, r.text)
        assert _check(doc, coat, "post", r)["error"]["message"]


def test_every_admin_answer_fits_the_document(served):
    doc = served.get("/openapi.json").json()
    release, rollback = "/models/{name}/release", "/models/{name}/rollback"
    assert _check(doc, release, "post", served.post("/models/coat/release",
                                                    json={"version": 2}))["error"]
    done = _check(doc, release, "post", served.post("/models/coat/release",
                                                    json={"version": 2}, headers=AUTH))
    assert done["action"] == "release" and done["previous"] == 1
    back = _check(doc, rollback, "post", served.post("/models/coat/rollback", headers=AUTH))
    assert back["action"] == "rollback" and back["version"] == 1
    for path, body, status in (("/models/coat/rollback", None, 409),
                               ("/models/coat/release", {"version": 1.5}, 422),
                               ("/models/nope/release", {"version": 1}, 404)):
        r = served.post(path, json=body, headers=AUTH)
        assert r.status_code == status, r.text
        _check(doc, release if path.endswith("release") else rollback, "post", r)
    # a release that repairs a damaged pointer says so, in a field the document declares
    (served.store / "gloss" / "live.json").write_bytes(b"{")
    repaired = _check(doc, release, "post", served.post("/models/gloss/release",
                                                        json={"version": 1}, headers=AUTH))
    assert repaired["repaired"]


def test_readiness_while_draining_fits_the_document(tmp_path, rows_csv):
    store = tmp_path / "store"
    _train(store, rows_csv, "gloss", ["gloss_gu"], 0.1, True)
    with Gunicorn(store, workers=1, env={"KRIDGE_DRAIN_SECONDS": "3"}) as g:
        doc = g.get("/openapi.json").json()
        g.proc.send_signal(signal.SIGTERM)
        # a list: a requests.Response with a 4xx or 5xx status is falsy
        r, = wait_for(lambda: [x for x in [g.get("/readyz")] if x.status_code == 503],
                      what="readyz to answer 503 while draining")
        assert _check(doc, "/readyz", "get", r)["draining"] is True


# -- one coverage rule: HTTP, kridge predict and the document ------------------------------

V1 = {"version": "1"}  # the same version on both sides, whatever the admin test left live


def _cli_predict(capsys, store, data, out, coverage: float) -> tuple[int, str]:
    code, _, err = run_cli(capsys, "predict", "coat", data, "--store", store, "--out", out,
                           "--version", "1", "--coverage", repr(coverage))
    return code, err


def test_document_states_the_coverage_the_service_gives(served):
    largest = largest_coverage(ROWS)  # 20/21, rounded down to a float the rank rule accepts
    assert largest == pytest.approx(ROWS / (ROWS + 1), abs=1e-15)
    doc = served.get("/openapi.json").json()
    body = doc["paths"]["/models/coat/predict"]["post"]["requestBody"]
    coverage = body["content"]["application/json"]["schema"]["properties"]["coverage"]
    assert coverage["anyOf"][0]["maximum"] == largest
    assert f"{ROWS} calibration residuals" in coverage["description"]
    assert repr(largest) in coverage["description"]


def test_http_and_cli_refuse_and_give_the_same_coverages(served, rows_csv, tmp_path, capsys):
    largest = largest_coverage(ROWS)
    out = tmp_path / "scored.csv"
    # 0.9524 is 20/21 rounded up at four decimals: no more usable than 0.9999
    for asked in (0.9999, round(ROWS / (ROWS + 1), 4)):
        code, err = _cli_predict(capsys, served.store, rows_csv, out, asked)
        assert code == 2, "kridge predict wrote unbounded intervals"
        assert not out.exists() and not list(tmp_path.glob("*.partial"))
        r = served.post("/models/coat/predict", params=V1, json={"rows": [TYPICAL_ROW],
                                                                 "coverage": asked})
        assert r.status_code == 422 and r.json()["error"]["code"] == "coverage_too_high"
        message = r.json()["error"]["message"]
        assert repr(largest) in message and repr(asked) in message
        assert err.strip() == f"kridge predict: error: {message}"
    # the largest named is given by both, with the same finite bounds
    r = served.post("/models/coat/predict", params=V1, json={
        "rows": [list(TYPICAL_ROW.values())], "coverage": largest})
    assert r.status_code == 200, r.text
    http_bounds = r.json()["results"][0]["interval"]
    row_csv = tmp_path / "row.csv"
    row_csv.write_text(",".join(TYPICAL_ROW) + "\n" + ",".join(map(str, TYPICAL_ROW.values()))
                       + "\n")
    code, err = _cli_predict(capsys, served.store, row_csv, out, largest)
    assert code == 0, err
    with open(out, newline="") as fh:
        scored = next(csv.DictReader(fh))
    cli_bounds = [[float(scored[f"{t}_{side}"]) for side in ("lower", "upper")]
                  for t in ("hardness_s", "gloss_gu")]
    assert all(math.isfinite(v) for pair in cli_bounds for v in pair)
    assert cli_bounds == http_bounds
