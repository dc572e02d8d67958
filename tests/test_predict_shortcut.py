"""The predict shortcut (service/routes/predict.py) answers exactly as Flask's route does.

Two apps on one store: the full app, where ``PredictShortcut`` sits in front of Flask, and a
reference whose shortcut layer is removed so that every request takes Flask's view. The
same requests, good and bad, must get the same status, headers (names in order, and values
but for the per-request timing and id), body (but for its timing), access-log line and
metric counts; the good ones must have been answered by the shortcut itself.
"""

from __future__ import annotations

import json

import orjson
import pytest
from make_coating_data import TYPICAL_ROW
from prometheus_client import REGISTRY
from service_helpers import small_model_store

from service.app import create_app
from service.routes.predict import PredictShortcut
from service.settings import Settings

ARRAY = list(TYPICAL_ROW.values())
FAR = [v * 40 for v in ARRAY]
JSON = "application/json"

#: (method, path, body (bytes or JSON-able), content type, expected status, shortcut answers)
CASES = [
    ("POST", "/models/c/predict", {"rows": [ARRAY]}, JSON, 200, True),
    ("POST", "/models/c/predict", {"rows": [TYPICAL_ROW, ARRAY]}, JSON, 200, True),
    ("POST", "/models/c/predict", {"rows": [ARRAY, FAR], "coverage": 0.9}, JSON, 200, True),
    ("POST", "/models/c/predict", {"rows": [ARRAY]}, "application/problem+json; x=1", 200,
     True),
    ("POST", "/models/c/predict", {"rows": [[1, 2, 3, 4, 5]]}, JSON, 200, True),
    ("POST", "/models/c/predict?version=1", {"rows": [ARRAY]}, JSON, 200, False),
    ("POST", "/models/c/predict", {"rows": [ARRAY, FAR], "ids": ["a", "b"]}, JSON, 200, True),
    ("POST", "/models/c/predict?version=1", {"rows": [ARRAY], "ids": ["a"]}, JSON, 200,
     False),
    ("POST", "/models/c/predict", {"rows": [ARRAY], "ids": ["a", "b"]}, JSON, 422, False),
    ("POST", "/models/c/predict?version=x", {"rows": [ARRAY]}, JSON, 400, False),
    ("POST", "/models/c/predict", {"rows": [[1.0, 2.0]]}, JSON, 422, False),
    ("POST", "/models/c/predict", {"rows": [{**TYPICAL_ROW, "extra": 1.0}]}, JSON, 422,
     False),
    ("POST", "/models/c/predict", {"rows": [ARRAY[:4] + ["600"]]}, JSON, 422, False),
    ("POST", "/models/c/predict", {"rows": [ARRAY], "coverage": 1.5}, JSON, 422, False),
    ("POST", "/models/c/predict", {"rows": [ARRAY] * 6}, JSON, 413, False),
    ("POST", "/models/c/predict", {"rows": [ARRAY], "pad": "x" * 4000}, JSON, 413, False),
    ("POST", "/models/c/predict", b'{"rows": [[1, 2', JSON, 400, False),
    ("POST", "/models/c/predict", b'{"rows": [[NaN, 1, 2, 3, 4]]}', JSON, 400, False),
    ("POST", "/models/c/predict", {"rows": [ARRAY]}, "text/plain", 415, False),
    ("POST", "/models/nope/predict", {"rows": [ARRAY]}, JSON, 404, False),
    ("POST", "/models/Bad Name/predict", {"rows": [ARRAY]}, JSON, 404, False),
    ("POST", "/models/c/predict/", {"rows": [ARRAY]}, JSON, 404, False),
    ("GET", "/models/c/predict", None, None, 405, False),
]


@pytest.fixture(scope="module")
def store(tmp_path_factory, demo_csv):
    return small_model_store(tmp_path_factory.mktemp("shortcut"), demo_csv)


def build(store, log, shortcut: bool):
    """The app, and a list that records every request reaching Flask itself."""
    app = create_app(Settings(store=str(store), max_rows=5, max_body_bytes=2000,
                              access_log=str(log)), watch=False)
    layer = app.wsgi_app.wsgi_app  # request log → shortcut → Flask
    assert isinstance(layer, PredictShortcut)
    reached = []
    flask_wsgi = layer.flask_wsgi

    def counted(environ, start_response):
        reached.append(environ["PATH_INFO"])
        return flask_wsgi(environ, start_response)

    layer.flask_wsgi = counted
    if not shortcut:
        app.wsgi_app.wsgi_app = counted
    return app, reached


def send(client, case):
    method, path, body, ctype, _, _ = case
    data = body if isinstance(body, bytes | None) else orjson.dumps(body)
    headers = {"Content-Type": ctype} if ctype else {}
    return client.open(path, method=method, data=data, headers=headers)


def counts() -> dict[str, float]:
    """Rows, flags and errors counted so far for model c, version 1."""
    def value(name, **labels):
        return REGISTRY.get_sample_value(name, {"model": "c", "version": "1", **labels}) or 0

    out = {"rows": value("kridge_rows_predicted_total"),
           "out_of_range": value("kridge_envelope_flags_total", flag="out_of_range"),
           "requests": value("kridge_request_seconds_count"),
           "computes": value("kridge_compute_seconds_count")}
    for code in ("invalid_request", "invalid_row", "unknown_feature", "not_a_number",
                 "invalid_ids", "too_many_rows", "request_entity_too_large",
                 "malformed_json", "unsupported_media_type", "invalid_version"):
        out[code] = value("kridge_errors_total", code=code)
    return out


def plain(body: bytes):
    """The JSON body without its timing (it differs from one request to the next)."""
    doc = json.loads(body)
    doc.pop("timing_ms", None)
    return doc


def test_the_shortcut_answers_as_the_flask_route_does(store, tmp_path):
    answers, logs, deltas = {}, {}, {}
    for shortcut in (True, False):
        log = tmp_path / f"access-{shortcut}.jsonl"
        app, reached = build(store, log, shortcut)
        client = app.test_client()
        before = counts()
        got = []
        for case in CASES:
            reached.clear()
            r = send(client, case)
            assert r.status_code == case[4], (case, r.get_data(as_text=True))
            assert (not reached) == (shortcut and case[5]), case  # who answered
            got.append(r)
        after = counts()
        deltas[shortcut] = {k: after[k] - before[k] for k in after}
        answers[shortcut] = got
        logs[shortcut] = [json.loads(line) for line in log.read_text().splitlines()]

    for case, fast, ref in zip(CASES, answers[True], answers[False], strict=True):
        assert [k for k, _ in fast.headers] == [k for k, _ in ref.headers], case
        for (key, a), (_, b) in zip(fast.headers, ref.headers, strict=True):
            if key not in ("Server-Timing", "X-Request-ID", "Content-Length"):
                assert a == b, (case, key)
        assert plain(fast.get_data()) == plain(ref.get_data()), case
        if fast.status_code == 200:
            timing = fast.json["timing_ms"]
            phases = dict(p.strip().split(";dur=") for p in
                          fast.headers["Server-Timing"].split(","))
            assert {k: float(v) for k, v in phases.items()} == timing
            assert len(fast.get_data()) == int(fast.headers["Content-Length"])
    # the same counts: rows, flags, histogram observations and error codes
    assert deltas[True] == deltas[False]
    assert deltas[True]["rows"] == 1 + 2 + 2 + 1 + 1 + 1 + 2 + 1
    assert deltas[True]["out_of_range"] >= 1 and deltas[True]["invalid_request"] >= 1
    assert deltas[True]["invalid_row"] == deltas[True]["unknown_feature"] == 1
    assert deltas[True]["not_a_number"] == deltas[True]["invalid_ids"] == 1

    def same(rec):
        return {k: v for k, v in rec.items() if k not in ("time", "request_id", "latency_ms")}

    assert [same(r) for r in logs[True]] == [same(r) for r in logs[False]]
    assert len(logs[True]) == len(CASES)
    first = same(logs[True][0])
    assert first == {"method": "POST", "route": "/models/<name>/predict", "model": "c",
                     "version": 1, "status": 200, "rows": 1}
