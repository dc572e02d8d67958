"""Limits before work: the row limit is checked before JSON parsing builds anything, a body
the predict shortcut refused is not parsed again by Flask, and a chunked body over the byte
limit is a 413 (service/request_body.py, service/routes/predict.py)."""

from __future__ import annotations

import json
import subprocess
import sys

import orjson
import pytest
import requests
from hypothesis import given, settings
from hypothesis import strategies as st
from make_coating_data import TYPICAL_ROW
from service_helpers import ROOT, Gunicorn, small_model_store

from service import answers
from service.app import create_app
from service.errors import ApiError
from service.request_body import container_counts
from service.routes import predict
from service.settings import Settings

#: 2.7 million empty rows: 8.1 MB, inside the default 8 MiB body limit.
EMPTY_ROWS = b'{"rows": [' + b"[]," * 2_700_000 + b"[]]}"


@pytest.fixture(scope="module")
def store(tmp_path_factory, demo_csv):
    return small_model_store(tmp_path_factory.mktemp("limits"), demo_csv)


@pytest.fixture
def no_json_parsing(monkeypatch):
    """Fails the test if the predict parser hands the body to the JSON parser."""
    calls = []

    def spy(raw):
        calls.append(len(raw))
        return orjson.loads(raw)

    monkeypatch.setattr(answers, "orjson", type("Spy", (), {
        "loads": staticmethod(spy), "JSONDecodeError": orjson.JSONDecodeError}))
    return calls


def test_too_many_rows_are_refused_without_parsing(no_json_parsing):
    assert len(EMPTY_ROWS) < 8 << 20
    with pytest.raises(ApiError) as err:
        answers.parse_body(EMPTY_ROWS, 10_000)
    assert err.value.status == 413 and err.value.code == "too_many_rows"
    assert "2700001 rows" in err.value.message and "10000" in err.value.message
    nested = b'{"rows": [[' + b"[]," * 100_000 + b"[]]]}"  # one row full of arrays
    with pytest.raises(ApiError) as err:
        answers.parse_body(nested, 10_000)
    assert err.value.status == 422 and "row values must be numbers" in err.value.message
    assert no_json_parsing == []


def test_brackets_inside_strings_do_not_count(no_json_parsing):
    """Feature names may hold brackets and escaped quotes: such a body at the row limit is
    parsed as usual (its count of [ and { bytes is over the bound, its arrays are not)."""
    row = {'t[C]{"a"}': 1.0}
    body = orjson.dumps({"rows": [row] * 100})
    assert body.count(b"[") + body.count(b"{") > 102
    assert len(answers.parse_body(body, 100).rows) == 100
    assert no_json_parsing == [len(body)]


def reference_counts(doc) -> tuple[int, int]:
    """(containers, containers at depth 3) by walking the parsed document."""
    total = rows = 0
    stack = [(doc, 1)]
    while stack:
        item, depth = stack.pop()
        if isinstance(item, dict | list):
            total += 1
            rows += depth == 3
            values = item.values() if isinstance(item, dict) else item
            stack.extend((v, depth + 1) for v in values)
    return total, rows


texts = st.text(alphabet=st.sampled_from('ab[]{}"\\,: \u00b0'), max_size=6)
documents = st.recursive(st.one_of(st.none(), st.booleans(), st.integers(), texts),
                         lambda inner: st.lists(inner, max_size=4)
                         | st.dictionaries(texts, inner, max_size=4), max_leaves=30)


@settings(max_examples=500, deadline=None)
@given(documents, st.booleans())
def test_container_counts_match_the_parsed_document(doc, ascii_only):
    """The byte scan agrees with Python's json module (the reference) on every document,
    strings full of brackets, quotes and backslashes included."""
    raw = json.dumps(doc, ensure_ascii=ascii_only).encode()
    assert container_counts(raw) == reference_counts(doc)


PEAK = """
import resource, sys
from service.answers import parse_body
from service.errors import ApiError
raw = b'{"rows": [' + b"[]," * 2_700_000 + b"[]]}"
before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
try:
    parse_body(raw, 10_000)
except ApiError as exc:
    assert exc.status == 413, exc.status
print((resource.getrusage(resource.RUSAGE_SELF).ru_maxrss - before) // 1024)
"""


def test_refusing_the_rows_costs_a_few_times_the_body_in_memory():
    """Peak memory growth (ru_maxrss, Linux: KiB) of refusing 2.7 million rows: parsing
    them first built 2.7 million lists (about 250 MB); the bracket scan needs a few bytes
    per body byte."""
    out = subprocess.run([sys.executable, "-c", PEAK], cwd=ROOT, capture_output=True,
                         text=True, timeout=120, env={"PYTHONPATH": str(ROOT)})
    assert out.returncode == 0, out.stderr
    grown_mb = int(out.stdout)
    assert grown_mb < 6 * len(EMPTY_ROWS) / 1e6, grown_mb


def test_a_refused_body_is_parsed_once(store, monkeypatch):
    app = create_app(Settings(store=str(store), max_rows=5), watch=False)
    calls = []
    parse = predict.parse_body

    def counted(raw, max_rows, *args):
        calls.append(len(raw))
        return parse(raw, max_rows, *args)

    monkeypatch.setattr(predict, "parse_body", counted)
    client = app.test_client()
    row = list(TYPICAL_ROW.values())
    for body, status in (({"rows": [row] * 6}, 413), ({"rows": [row[:2]]}, 422),
                         ({"rows": [row]}, 200)):
        calls.clear()
        r = client.post("/models/c/predict", json=body)
        assert r.status_code == status, r.get_data(as_text=True)
        assert len(calls) == 1, (status, calls)


def test_a_chunked_body_over_the_limit_is_413(store):
    def chunks(total: int):
        piece = b" " * 65536
        for _ in range(total // len(piece)):
            yield piece

    with Gunicorn(store, workers=1, env={"KRIDGE_MAX_BODY_BYTES": str(1 << 20)}) as g:
        g.wait_ready()
        url = g.base + "/models/c/predict"
        r = requests.post(url, data=chunks(2 << 20), timeout=30,
                          headers={"Content-Type": "application/json"})
        assert r.status_code == 413, r.text
        assert r.json()["error"]["code"] == "request_entity_too_large"
        assert "larger than 1048576 bytes" in r.json()["error"]["message"]
        body = json.dumps({"rows": [TYPICAL_ROW]}).encode()
        ok = requests.post(url, data=iter([body[:10], body[10:]]), timeout=30,
                           headers={"Content-Type": "application/json"})
        assert ok.status_code == 200 and len(ok.json()["results"]) == 1  # chunked, in limit
