"""The HTTP service, end to end: a real gunicorn with two workers on a free localhost port."""

from __future__ import annotations

import json
import math
import os
import re
import subprocess
import sys

import numpy as np
import pytest
from cli_helpers import KRIDGE, kridge
from make_coating_data import EMPTY_REGION_ROW, TYPICAL_ROW
from service_helpers import Gunicorn, metric_count, metric_samples, wait_for

from service import load_model
from service.app import create_app
from service.settings import Settings
from service.store import Store

TOKEN = "test-token-7f3a"
TRAIN_ARGS = ["--target", "hardness_s,gloss_gu", "--gamma", "0.2", "--ridge", "0.1",
              "--no-report", "--quiet"]


@pytest.fixture(scope="module")
def served(tmp_path_factory, demo_csv):
    """Store with coating v1 live, and a 2-worker service on it (admin token set)."""
    root = tmp_path_factory.mktemp("svc")
    store = root / "store"
    r = kridge("train", str(demo_csv), "--name", "coating", "--release", *TRAIN_ARGS,
               store=store)
    assert r.returncode == 0, r.stderr
    env = {"KRIDGE_ADMIN_TOKEN": TOKEN, "KRIDGE_MAX_ROWS": "200",
           "KRIDGE_MAX_BODY_BYTES": str(64 * 1024), "KRIDGE_POLL_SECONDS": "0.2",
           "PROMETHEUS_MULTIPROC_DIR": str(root / "metrics")}
    with Gunicorn(store, workers=2, env=env) as g:
        g.store = store
        g.metrics_dir = root / "metrics"
        yield g


def predict(g, body, **kw):
    return g.post("/models/coating/predict", json=body, **kw)


def test_predictions_equal_load_model_exactly(served, demo_csv):
    model = load_model(served.store, "coating")
    data = np.loadtxt(demo_csv, delimiter=",", skiprows=1, max_rows=25)[:, :5]
    expected = model.predict(data)
    as_arrays = predict(served, {"rows": data.tolist()})
    as_objects = predict(served, {"rows": [dict(zip(model.features, r, strict=True))
                                           for r in data.tolist()]})
    assert as_arrays.status_code == 200 and as_objects.status_code == 200
    got = np.array([r["value"] for r in as_arrays.json()["results"]])
    assert np.array_equal(got, expected)  # exact: same engine, JSON floats round-trip
    assert as_arrays.json()["results"] == as_objects.json()["results"]


def test_envelope_flags(served, demo_csv):
    model = load_model(served.store, "coating")
    data = np.loadtxt(demo_csv, delimiter=",", skiprows=1)[:, :5]
    central = data[np.argmin(model.novelty(model.standardize(data)))]
    too_hot = dict(TYPICAL_ROW, oven_temp_c=260.0)
    body = predict(served, {"rows": [central.tolist(), too_hot, EMPTY_REGION_ROW]}).json()
    inside, hot, hole = (r["envelope"] for r in body["results"])
    assert inside == {"inside": True, "out_of_range": {}, "novelty": inside["novelty"],
                      "novel": False, "t2": inside["t2"], "q": inside["q"],
                      "target_out_of_range": {}, "flagged_by": []}
    assert hot["inside"] is False and hot["flagged_by"][0] == "range"
    assert hot["out_of_range"] == {"oven_temp_c": {
        "value": 260.0, "min": float(data[:, 0].min()), "max": float(data[:, 0].max())}}
    # inside every per-feature range, but in the demo's never-run region
    assert hole["out_of_range"] == {} and hole["novel"] is True and hole["novelty"] > 1
    assert "extrapolation" in body["caution"]
    calm = predict(served, {"rows": [central.tolist()]}).json()
    assert "caution" not in calm


def test_intervals_and_timing_headers(served):
    r = predict(served, {"rows": [TYPICAL_ROW], "coverage": 0.9})
    assert r.status_code == 200
    body = r.json()
    model = load_model(served.store, "coating")
    half = model.half_width(0.9)
    res = body["results"][0]
    for j, (lo, hi) in enumerate(res["interval"]):
        assert lo == pytest.approx(res["value"][j] - half[j], rel=1e-12)
        assert hi == pytest.approx(res["value"][j] + half[j], rel=1e-12)
    timing = body["timing_ms"]
    assert set(timing) == {"parse", "compute", "total"}
    assert all(math.isfinite(v) and v > 0 for v in timing.values()), timing
    # parse and compute are disjoint parts of the request, so the total covers both (each
    # figure is rounded to 0.1 µs)
    assert timing["total"] >= timing["parse"] + timing["compute"] - 2e-4, timing
    phases = dict(p.strip().split(";dur=") for p in r.headers["Server-Timing"].split(","))
    assert {k: float(v) for k, v in phases.items()} == timing  # header and body agree
    assert r.headers["X-Model-Version"] == str(body["version"])


BAD_INPUTS = [
    # (body or raw bytes, content type, status, words the message must contain)
    (b'{"rows": [[1, 2', "application/json", 400, ["not valid JSON"]),
    (b'{"rows": [[NaN, 1, 2, 3, 4]]}', "application/json", 400, ["NaN"]),
    (b'{"rows": [[Infinity, 1, 2, 3, 4]]}', "application/json", 400, ["Infinity"]),
    ({"rows": [[190, 22, 60, 45, "600"]]}, None, 422, ["row 0", "position 4"]),
    ({"rows": [[190, 22, 60, 45, 600], [190, True, 60, 45, 600]]}, None, 422,
     ["row 1", "position 1"]),
    ({"rows": [[190, 22, 60]]}, None, 422, ["row 0", "3 values", "takes 5"]),
    ({"rows": [dict(TYPICAL_ROW, colour=3)]}, None, 422, ["row 0", "unknown", "colour"]),
    ({"rows": [{k: v for k, v in TYPICAL_ROW.items() if k != "humidity_pct"}]}, None, 422,
     ["row 0", "missing", "humidity_pct"]),
    ({"rows": [dict(TYPICAL_ROW, wet_film_um="thick")]}, None, 422,
     ["row 0", "wet_film_um"]),
    ({"rows": []}, None, 422, ["rows"]),
    ({"rows": [[]]}, None, 422, ["row 0"]),
    ({"rows": ["abc"]}, None, 422, ["row 0"]),
    ({"rows": [TYPICAL_ROW], "coverage": 1.5}, None, 422, ["coverage"]),
    ({"rows": [TYPICAL_ROW], "coverage": 0}, None, 422, ["coverage"]),
    ({"rows": [TYPICAL_ROW], "coverage": 0.99999}, None, 422, ["coverage", "calibration"]),
    ({"rows": [TYPICAL_ROW], "extra": 1}, None, 422, ["extra"]),
    ({"data": [TYPICAL_ROW]}, None, 422, ["rows"]),
    ([1, 2], None, 422, ["object"]),
    ({"rows": [TYPICAL_ROW] * 201}, None, 413, ["201 rows", "200"]),
    (b"rows=1", "text/plain", 415, ["JSON"]),
    (b"{" + b" " * (70 * 1024) + b"}", "application/json", 413, ["larger than"]),
]


@pytest.mark.parametrize("body, ctype, status, words", BAD_INPUTS)
def test_bad_inputs_get_4xx_naming_the_fault(served, body, ctype, status, words):
    if isinstance(body, bytes):
        r = served.post("/models/coating/predict", data=body,
                        headers={"Content-Type": ctype})
    else:
        r = predict(served, body)
    assert r.status_code == status, r.text
    err = r.json()["error"]
    assert set(err) == {"code", "message", "details"}
    for w in words:
        assert w in err["message"], err["message"]
    assert "Traceback" not in r.text and str(served.store) not in r.text


def test_unknown_model_version_and_method(served):
    unknown = served.post("/models/nosuch/predict", json={"rows": [[1]]})
    assert unknown.status_code == 404 and str(served.store) not in unknown.text
    assert unknown.json()["error"]["message"] == "no model named 'nosuch'"
    assert served.post("/models/..%2Fetc/predict", json={"rows": [[1]]}).status_code == 404
    assert predict(served, {"rows": [TYPICAL_ROW]}, params={"version": "99"}).status_code == 404
    assert predict(served, {"rows": [TYPICAL_ROW]}, params={"version": "x"}).status_code == 400
    r = served.get("/models/coating/predict")
    assert r.status_code == 405 and r.json()["error"]["code"] == "method_not_allowed"
    assert "POST" in r.headers["Allow"] and "GET" not in r.headers["Allow"]
    assert served.get("/nowhere").json()["error"]["code"] == "not_found"


def test_discovery_routes_and_openapi(served):
    from openapi_spec_validator import validate

    models = served.get("/models").json()["models"]
    assert models[0]["name"] == "coating" and models[0]["live_version"] >= 1
    summary = served.get("/models/coating").json()
    assert summary["features"][0] == "oven_temp_c" and summary["intervals"] is True
    versions = served.get("/models/coating/versions").json()
    assert [v["live"] for v in versions["versions"]].count(True) == 1
    assert served.get("/healthz").json() == {"up": True}
    doc = served.get("/openapi.json").json()
    validate(doc)  # reference: openapi-spec-validator, OpenAPI 3.1 schema
    assert doc["openapi"].startswith("3.1")
    for path in ("/models/coating/predict", "/models/{name}/release", "/metrics", "/readyz"):
        assert path in doc["paths"]
    req_schema = doc["components"]["schemas"]["RowBatch"]
    assert set(req_schema["properties"]) == {"rows", "coverage", "ids"}


def test_metrics_add_up_across_workers(served):
    def rows_total():
        samples = metric_samples(served.get("/metrics").text)
        return sum(v for (n, _), v in samples.items() if n == "kridge_rows_predicted_total")

    before = rows_total()
    n = 40
    for _ in range(n):
        assert predict(served, {"rows": [TYPICAL_ROW, TYPICAL_ROW]}).status_code == 200
    assert rows_total() - before == 2 * n
    # both workers wrote their own files: multiprocess mode summed two processes
    pids = {p.stem.rsplit("_", 1)[-1] for p in served.metrics_dir.glob("counter_*.db")}
    assert len(pids) >= 2
    samples = metric_samples(served.get("/metrics").text)
    names = {n for n, _ in samples}
    assert {"kridge_request_seconds_bucket", "kridge_compute_seconds_count",
            "kridge_envelope_flags_total", "kridge_errors_total"} <= names


def test_admin_routes_need_the_token(served):
    no = served.post("/models/coating/rollback")
    wrong = served.post("/models/coating/rollback", headers={"Authorization": "Bearer nope"})
    assert no.status_code == 401 and wrong.status_code == 401
    assert served.post("/models/coating/release", json={"version": 1},
                       headers={"Authorization": "Basic " + TOKEN}).status_code == 401


def test_admin_routes_disabled_without_token(tmp_path):
    app = create_app(Settings(store=str(tmp_path), admin_token=None), watch=False)
    client = app.test_client()
    r = client.post("/models/coating/rollback", headers={"Authorization": "Bearer x"})
    assert r.status_code == 403 and r.get_json()["error"]["code"] == "admin_disabled"


def _versions_seen(served, n=40) -> set[str]:
    return {predict(served, {"rows": [TYPICAL_ROW]}).headers["X-Model-Version"]
            for _ in range(n)}


def every_worker_serves(served, version) -> bool:
    return _versions_seen(served) == {str(version)}


def test_release_reaches_every_worker(served, demo_csv):
    """Every worker follows live.json on its own poll (KRIDGE_POLL_SECONDS, 0.2 s here)."""
    r = kridge("train", str(demo_csv), "--name", "coating", *TRAIN_ARGS, "--ridge", "0.5",
               store=served.store)
    assert r.returncode == 0, r.stderr
    new = max(Store(served.store).versions("coating"))
    assert _versions_seen(served, 10) != {str(new)}  # not released yet
    r = kridge("release", "coating", str(new), store=served.store)
    assert r.returncode == 0, r.stderr
    wait_for(lambda: every_worker_serves(served, new), what=f"version {new} everywhere")

    auth = {"Authorization": f"Bearer {TOKEN}"}
    back = served.post("/models/coating/rollback", headers=auth)
    assert back.status_code == 200, back.text
    assert back.json()["previous"] == new
    old = back.json()["version"]
    wait_for(lambda: every_worker_serves(served, old), what=f"version {old} everywhere")
    again = served.post("/models/coating/release", json={"version": new}, headers=auth)
    assert again.status_code == 200 and again.json()["version"] == new
    wait_for(lambda: every_worker_serves(served, new), what=f"version {new} everywhere")
    # a pinned version is served on demand while another is live
    pinned = predict(served, {"rows": [TYPICAL_ROW]}, params={"version": "1"})
    assert pinned.status_code == 200 and pinned.headers["X-Model-Version"] == "1"


def test_broken_live_version_is_never_served(served, demo_csv):
    store = Store(served.store)
    r = kridge("train", str(demo_csv), "--name", "coating", *TRAIN_ARGS, store=served.store)
    assert r.returncode == 0, r.stderr
    bad = max(store.versions("coating"))
    serving = store.live_version("coating")
    arr = store.version_dir("coating", bad) / "arrays" / "dual.npy"
    raw = bytearray(arr.read_bytes())
    raw[-3] ^= 0xFF
    arr.write_bytes(bytes(raw))
    # another tool points live.json at it without verifying (the CLI would refuse)
    live = store.model_dir("coating") / "live.json"
    saved = live.read_text()
    tmp = live.with_suffix(".tmp")
    tmp.write_text(json.dumps({"version": bad, "since": "now", "previous": serving}))
    tmp.replace(live)
    try:
        # each worker refuses the damaged version on its own: both have acted once both counted
        wait_for(lambda: metric_count(metric_samples(served.get("/metrics").text),
                                      "kridge_load_failures_total", version=str(bad)) >= 2,
                 what=f"both workers to refuse version {bad}")
        assert _versions_seen(served, 20) == {str(serving)}
        ready = served.get("/readyz")
        assert ready.status_code == 503 and "coating" in ready.json()["problems"]
        assert f"version {bad}" in ready.json()["problems"]["coating"]
    finally:
        tmp.write_text(saved)
        tmp.replace(live)
    wait_for(lambda: all(served.get("/readyz").status_code == 200 for _ in range(8)),
             what="every worker ready again")


def test_demo_smoke(tmp_path):
    r = subprocess.run([*KRIDGE, "demo", "--smoke", "--store", str(tmp_path / "s")],
                       capture_output=True, text=True, timeout=600)
    assert r.returncode == 0, r.stdout + r.stderr
    answers = [json.loads(line.split(": ", 1)[1]) for line in r.stdout.splitlines()
               if line.startswith("HTTP 200: ")]
    assert len(answers) == 2
    assert answers[0]["results"][0]["envelope"]["inside"] is True
    assert "interval" in answers[0]["results"][0]
    assert all(not res["envelope"]["inside"] for res in answers[1]["results"])
    assert "curl -s -X POST" in r.stdout
    first = r.stdout.splitlines()[0]  # the page's address comes first
    assert first.startswith("Page for people: http://127.0.0.1:") and first.endswith("3/3)")
    assert re.search(r"page http://127\.0\.0\.1:\d+/: HTTP 200, coating listed: True",
                     r.stdout)


def test_gunicorn_config_loads_before_numpy():
    # numpy imported in the master would start OpenBLAS's threads before the config limits
    # them, and every forked worker would inherit a multi-threaded BLAS
    code = ("import sys, os, service.gunicorn_config; "
            "assert 'numpy' not in sys.modules, 'numpy imported by the config'; "
            "assert os.environ['OPENBLAS_NUM_THREADS'] == '1'")
    env = {k: v for k, v in os.environ.items() if k != "OPENBLAS_NUM_THREADS"}
    r = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
