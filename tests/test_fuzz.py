"""Fuzzing as a test: the API against its own OpenAPI document, request parsing and CSV
loading against arbitrary bytes.

- schemathesis 4 (``st run``, every check, coverage, fuzzing and stateful phases) against a
  real gunicorn's ``/openapi.json``, once without and once with the admin token: no failure,
  no 5xx in the access log. The case count here is kept small for ``make test``;
  ``bench/fuzz.py`` runs the same with many more.
- hypothesis: any byte string as a predict body gives a parsed request or a 4xx ApiError,
  and a parsed request gives finite predictions or a 4xx; the same bytes sent to the real
  service get a JSON 4xx or a 200, never a 5xx or a dropped connection; any bytes as a CSV
  file give a table or a ``UserError``, never another exception.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import requests
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from service_helpers import Gunicorn

from bench.fuzz_harness import TOKEN, run_schemathesis, served_env, small_store
from bench.fuzz_harness import statuses as logged_statuses
from service import load_model
from service.answers import parse_body, predict_response
from service.errors import ApiError
from trainer.errors import UserError
from trainer.read.columns import read_table


@pytest.fixture(scope="module")
def fuzz_served(tmp_path_factory, demo_csv):
    root = tmp_path_factory.mktemp("fuzz")
    store = small_store(root, demo_csv)
    log = root / "access.log"
    with Gunicorn(store, workers=2, env=served_env(root, log)) as g:
        g.root, g.store, g.log_path = root, store, log
        yield g


@pytest.mark.parametrize("token", [None, TOKEN], ids=["anonymous", "admin"])
def test_schemathesis_finds_no_failure(fuzz_served, token, tmp_path):
    before = len(logged_statuses(fuzz_served.log_path))
    res = run_schemathesis(fuzz_served.base, tmp_path, max_examples=8, seed=11, token=token)
    assert res["exit"] == 0 and res["clean"], res["output"][-6000:]
    assert res["generated"] >= 100 and res["passed"] == res["generated"]
    statuses = logged_statuses(fuzz_served.log_path)[before:]
    assert len(statuses) >= res["generated"]
    assert [s for s in statuses if s >= 500] == []
    if token:  # the admin routes were reached with the right token, not only refused
        assert 200 in statuses and 409 in statuses
    print(f"schemathesis ({'admin' if token else 'anonymous'}): {res['generated']} cases, "
          f"{len(statuses)} requests, 0 failures, 0 5xx")


# -- request parsing ------------------------------------------------------------------------

NUMBERS = st.one_of(st.floats(allow_nan=True, allow_infinity=True), st.integers(-10**20, 10**20))
JSONISH = st.recursive(
    st.one_of(st.none(), st.booleans(), NUMBERS, st.text(max_size=8)),
    lambda inner: st.one_of(st.lists(inner, max_size=6),
                            st.dictionaries(st.text(max_size=12), inner, max_size=6)),
    max_leaves=30,
)


def _row_like(features):
    value = st.one_of(st.floats(allow_nan=False, allow_infinity=False),
                      st.integers(-10**15, 10**15))
    return st.one_of(
        st.lists(value, min_size=len(features), max_size=len(features)),
        st.fixed_dictionaries({f: value for f in features}),
        JSONISH,
    )


def _bodies(features):
    shaped = st.fixed_dictionaries(
        {"rows": st.lists(_row_like(features), min_size=0, max_size=8)},
        optional={"coverage": st.one_of(st.floats(), st.integers(-2, 2), st.none())},
    ).map(lambda d: json.dumps(d).encode())
    return st.one_of(st.binary(max_size=300), JSONISH.map(lambda v: json.dumps(v).encode()),
                     shaped)


@pytest.fixture(scope="module")
def model(tmp_path_factory, demo_csv):
    return load_model(small_store(tmp_path_factory.mktemp("parse"), demo_csv, 1), "coating")


FEATURES = ["oven_temp_c", "line_speed_m_min", "wet_film_um", "humidity_pct", "viscosity_mpas"]


@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(raw=_bodies(FEATURES))
def test_any_bytes_parse_to_a_request_or_a_4xx(model, raw):
    try:
        req = parse_body(raw, max_rows=50)
    except ApiError as exc:
        assert 400 <= exc.status < 500 and exc.message
        json.dumps(exc.body())  # the error body is plain JSON
        return
    try:
        body, _ = predict_response(model, req, 0.0, 0.0)
    except ApiError as exc:
        assert 400 <= exc.status < 500 and exc.message
        return
    for res in body["results"]:
        values = res["value"] if isinstance(res["value"], list) else [res["value"]]
        assert all(math.isfinite(v) for v in values)
        assert math.isfinite(res["envelope"]["novelty"])


@settings(max_examples=60, deadline=None, suppress_health_check=[
    HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(raw=_bodies(FEATURES))
def test_any_bytes_over_http_get_a_json_4xx_or_predictions(fuzz_served, raw):
    r = requests.post(fuzz_served.base + "/models/coating/predict", data=raw,
                      headers={"Content-Type": "application/json"}, timeout=30)
    assert r.status_code == 200 or 400 <= r.status_code < 500, r.text
    body = r.json()
    if r.status_code != 200:
        assert set(body["error"]) == {"code", "message", "details"}
        assert str(fuzz_served.store) not in r.text


# -- CSV loading ----------------------------------------------------------------------------

CSV_PIECES = st.sampled_from([b"a", b"b", b"y", b",", b"\n", b"\r\n", b'"', b"1", b"-2.5",
                              b"1e400", b"nan", b"inf", b" ", b"\x00", b"\xff", b"\xef\xbb\xbf",
                              b";", b"\t", b"0x1", b"1_0", b"", b"3,4\n"])
CSV_BYTES = st.one_of(st.binary(max_size=200),
                      st.lists(CSV_PIECES, max_size=40).map(b"".join),
                      st.lists(CSV_PIECES, max_size=40).map(
                          lambda p: b"a,b,y\n1,2,3\n" + b"".join(p)))


@settings(max_examples=300, deadline=None, suppress_health_check=[
    HealthCheck.function_scoped_fixture])
@given(raw=CSV_BYTES)
def test_any_bytes_as_csv_give_a_table_or_a_user_error(tmp_path, raw):
    path = tmp_path / "fuzz.csv"
    path.write_bytes(raw)
    try:
        table = read_table(path)
    except UserError as exc:
        assert str(exc)
        return
    values = np.asarray(table.values)
    assert values.ndim == 2 and values.shape[1] == len(table.columns)
    assert np.isfinite(values).all()
