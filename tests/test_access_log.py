"""Request ids and the JSON-lines access log, from a real gunicorn."""

from __future__ import annotations

import json

import pytest
from make_coating_data import TYPICAL_ROW
from service_helpers import Gunicorn

from service.access_log import FIELDS, request_id
from trainer.cli import main

TOKEN = "admin-secret-4b1e9c"
ARGS = ["--target", "hardness_s", "--features", ",".join(TYPICAL_ROW), "--gamma", "0.2",
        "--ridge", "0.5", "--no-report", "--quiet"]


@pytest.mark.parametrize("given, kept", [
    ("caller-42", True), ("a.b:c_d-1", True), ("x" * 64, True),
    ("x" * 65, False), ("has space", False), ("", False), (None, False),
    ("é", False), ("id\r\nX-Evil: 1", False), ('{"json": 1}', False),
])
def test_request_id_keeps_only_sane_short_tokens(given, kept):
    rid = request_id(given)
    if kept:
        assert rid == given
    else:
        assert rid != given and len(rid) == 32 and int(rid, 16) >= 0


def test_access_log_lines_are_json_with_the_fields_and_no_secrets(tmp_path, small_csv):
    store = tmp_path / "secret-store-path"
    assert main(["train", str(small_csv), "--name", "c", "--release", "--store", str(store),
                 *ARGS]) == 0
    access, errors = tmp_path / "access.jsonl", tmp_path / "gunicorn.log"
    env = {"KRIDGE_ACCESS_LOG": str(access), "KRIDGE_ADMIN_TOKEN": TOKEN,
           "KRIDGE_TEST_LOG": str(errors)}
    auth = {"Authorization": f"Bearer {TOKEN}"}
    with Gunicorn(store, workers=2, env=env) as g:
        calls = [
            g.post("/models/c/predict", json={"rows": [TYPICAL_ROW, TYPICAL_ROW]},
                   headers={"X-Request-ID": "caller-42"}),
            g.post("/models/c/predict?version=1", json={"rows": [TYPICAL_ROW]},
                   headers={"X-Request-ID": "bad id with spaces"}),
            g.post("/models/c/predict", json={"rows": [[1.0]]}),  # 422
            g.post("/models/nope/predict", json={"rows": [TYPICAL_ROW]}),  # 404
            g.get(f"/no/such/route?token={TOKEN}"),  # 404 without a route
            g.post("/models/c/rollback", headers=auth),  # nothing to roll back to
            g.post("/models/c/release", json={"version": 1}, headers=auth),
            g.get("/readyz"),
        ]
    statuses = [r.status_code for r in calls]
    assert statuses[:2] == [200, 200] and statuses[2:5] == [422, 404, 404]
    assert statuses[7] == 200
    ids = [r.headers["X-Request-ID"] for r in calls]
    assert ids[0] == "caller-42" and ids[1] != "bad id with spaces" and len(set(ids)) == 8

    text = access.read_text()
    lines = [json.loads(line) for line in text.splitlines()]
    assert all(tuple(rec) == FIELDS for rec in lines)
    by_id = {rec["request_id"]: rec for rec in lines}
    assert set(ids) <= set(by_id) and len(by_id) == len(lines)
    # the rest: the helper's start-up probes of /readyz
    assert {rec["route"] for rid, rec in by_id.items() if rid not in ids} == {"/readyz"}
    first = by_id["caller-42"]
    assert {k: first[k] for k in ("method", "route", "model", "version", "status", "rows")} == {
        "method": "POST", "route": "/models/<name>/predict", "model": "c", "version": 1,
        "status": 200, "rows": 2}
    assert first["latency_ms"] > 0 and first["time"].endswith("Z")
    assert by_id[ids[1]]["rows"] == 1 and by_id[ids[1]]["version"] == 1
    assert by_id[ids[2]]["status"] == 422 and by_id[ids[2]]["rows"] is None
    assert by_id[ids[4]]["route"] is None and by_id[ids[4]]["model"] is None
    assert by_id[ids[5]]["route"] == "/models/<name>/rollback"
    for rec, r in zip((by_id[i] for i in ids), calls, strict=True):
        assert rec["status"] == r.status_code
    # nothing secret or local: neither the admin token nor the store's location, in any log
    gunicorn_log = errors.read_text()
    for leak in (TOKEN, "secret-store-path", str(tmp_path)):
        assert leak not in text
        assert TOKEN not in gunicorn_log
    # gunicorn's own log stays plain text, not JSON
    assert gunicorn_log.startswith("[") and "Booting worker" in gunicorn_log
