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
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import requests
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from service_helpers import Gunicorn

from service import load_model
from service.answers import parse_body, predict_response
from service.errors import ApiError
from trainer.data import read_table
from trainer.errors import UserError
from trainer.train import TrainOptions, train

TOKEN = "fuzz-token-2e77a1"
ST = str(Path(sys.executable).with_name("st"))

#: The status codes a refused request may get. negative_data_rejection's default list lacks
#: 413, the status RFC 9110 §15.5.14 gives to a body over the limit (our row limit, which
#: the document states as maxItems).
CONFIG = """\
[checks.negative_data_rejection]
expected-statuses = ["400", "401", "403", "404", "405", "409", "413", "415", "422"]
"""


def run_schemathesis(base: str, workdir: Path, max_examples: int, seed: int,
                     token: str | None = None) -> dict:
    """``st run`` with every check; returns counts parsed from its summary."""
    config = workdir / "schemathesis.toml"
    config.write_text(CONFIG)
    # one worker: st 4.32 on Python 3.11 can trip over its own AST cache with several
    argv = [ST, "--config-file", str(config), "run", f"{base}/openapi.json", "--checks", "all",
            "--max-examples", str(max_examples), "--seed", str(seed), "--workers", "1",
            "--no-color", "--generation-database", "none"]
    if token:
        argv += ["--header", f"Authorization: Bearer {token}"]
    r = subprocess.run(argv, capture_output=True, text=True, cwd=workdir, timeout=900)
    out = r.stdout + r.stderr
    found = re.search(r"(\d+) generated, (\d+) passed", out)
    return {"exit": r.returncode, "generated": int(found[1]) if found else 0,
            "passed": int(found[2]) if found else 0,
            "clean": not re.search(r"\d+ (failures?|errors?)\b", out), "output": out}


def small_store(root: Path, csv_src: Path, versions: int = 2) -> Path:
    """coating v1 … vN (the first 60 demo rows), v1 live."""
    csv = root / "small.csv"
    csv.write_text("\n".join(csv_src.read_text().splitlines()[:61]) + "\n")
    store = root / "store"
    for i in range(versions):
        opts = TrainOptions(data=str(csv), targets=["hardness_s", "gloss_gu"], name="coating",
                            kernel="rbf", gamma=0.2, ridge=0.1 * (i + 1), store=str(store),
                            quiet=True, report=False, release=(i == 0))
        train(opts, log=lambda *a, **k: None)
    return store


def served_env(root: Path, log: Path) -> dict[str, str]:
    """The fuzzed service's settings: admin on, small limits, the access log in ``log``."""
    return {"KRIDGE_ADMIN_TOKEN": TOKEN, "KRIDGE_MAX_ROWS": "50",
            "KRIDGE_MAX_BODY_BYTES": str(64 * 1024), "KRIDGE_POLL_SECONDS": "0.1",
            "PROMETHEUS_MULTIPROC_DIR": str(root / "metrics"), "KRIDGE_ACCESS_LOG": "-",
            "KRIDGE_TEST_LOG": str(log)}


@pytest.fixture(scope="module")
def fuzz_served(tmp_path_factory, demo_csv):
    root = tmp_path_factory.mktemp("fuzz")
    store = small_store(root, demo_csv)
    log = root / "access.log"
    with Gunicorn(store, workers=2, env=served_env(root, log)) as g:
        g.root, g.store, g.log_path = root, store, log
        yield g


def _statuses(log: Path) -> list[int]:
    """Statuses from the JSON-lines access log (one object per request)."""
    return [int(m[1]) for m in re.finditer(r'"status":\s*(\d{3})', log.read_text())]


@pytest.mark.parametrize("token", [None, TOKEN], ids=["anonymous", "admin"])
def test_schemathesis_finds_no_failure(fuzz_served, token, tmp_path):
    before = len(_statuses(fuzz_served.log_path))
    res = run_schemathesis(fuzz_served.base, tmp_path, max_examples=8, seed=11, token=token)
    assert res["exit"] == 0 and res["clean"], res["output"][-6000:]
    assert res["generated"] >= 100 and res["passed"] == res["generated"]
    statuses = _statuses(fuzz_served.log_path)[before:]
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
