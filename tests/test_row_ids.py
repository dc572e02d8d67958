"""Row ids over HTTP and one error wording per cause of a refused row value."""

from __future__ import annotations

import orjson
import pytest
from make_coating_data import TYPICAL_ROW
from service_helpers import small_model_store

from service.app import create_app
from service.schemas import MAX_ID_CHARS
from service.settings import Settings

ARRAY = list(TYPICAL_ROW.values())
FEATURES = list(TYPICAL_ROW)


@pytest.fixture(scope="module")
def client(tmp_path_factory, demo_csv):
    store = small_model_store(tmp_path_factory.mktemp("ids"), demo_csv)
    app = create_app(Settings(store=str(store), max_rows=50), watch=False)
    return app.test_client()


def post(client, body, query: str = ""):
    return client.post(f"/models/c/predict{query}", data=orjson.dumps(body),
                       headers={"Content-Type": "application/json"})


@pytest.mark.parametrize("query", ["", "?version=1"])  # the shortcut, then Flask's view
def test_ids_come_back_with_their_rows(client, query):
    rows = [TYPICAL_ROW, ARRAY, {**TYPICAL_ROW, "oven_temp_c": 150.0}]
    ids = ["s-1", "", "x" * MAX_ID_CHARS]
    plain = post(client, {"rows": rows, "coverage": 0.9}, query)
    tagged = post(client, {"rows": rows, "coverage": 0.9, "ids": ids}, query)
    assert plain.status_code == tagged.status_code == 200, tagged.get_data(as_text=True)
    got, ref = tagged.json["results"], plain.json["results"]
    assert [r["id"] for r in got] == ids
    assert [list(r)[0] for r in got] == ["id"] * 3  # first, so a reader sees it first
    assert [{k: v for k, v in r.items() if k != "id"} for r in got] == ref
    assert b'"id"' not in plain.get_data()


def test_an_answer_without_ids_keeps_its_bytes(client):
    body = {"rows": [TYPICAL_ROW, ARRAY]}
    with_null = post(client, {**body, "ids": None}).json
    without = post(client, body).get_data()
    # every byte up to the timing (which differs per request) is as before ids existed,
    # the target names included
    head = without[: without.index(b'"timing_ms"')]
    assert head.startswith(b'{"model":"c","version":1,"targets":["hardness_s"],'
                           b'"results":[{"value":')
    assert orjson.loads(head[:-1] + b"}")["results"] == with_null["results"]


@pytest.mark.parametrize(("ids", "code", "says"), [
    (["a"], "invalid_ids", "field 'ids': 1 ids for 2 rows"),
    (["a", "b", "c"], "invalid_ids", "field 'ids': 3 ids for 2 rows"),
    (["a", 7], "invalid_ids", "field 'ids', row 1: an id must be a string"),
    (["a", "x" * (MAX_ID_CHARS + 1)], "invalid_ids", "field 'ids', row 1:"),
    ("a,b", "invalid_ids", "field 'ids': must be a list of strings"),
])
@pytest.mark.parametrize("query", ["", "?version=1"])
def test_ids_of_the_wrong_length_or_type_are_refused(client, ids, code, says, query):
    r = post(client, {"rows": [TYPICAL_ROW, ARRAY], "ids": ids}, query)
    assert r.status_code == 422
    assert r.json["error"]["code"] == code
    assert r.json["error"]["message"].startswith(says), r.json


FIRST = FEATURES[0]


@pytest.mark.parametrize(("row", "code", "message"), [
    # an extra field: unknown, whatever its value
    ({**TYPICAL_ROW, "note": "late"}, "unknown_feature", "row 1, feature 'note': unknown feature"),
    ({**TYPICAL_ROW, "note": 3.0}, "unknown_feature", "row 1, feature 'note': unknown feature"),
    ({**TYPICAL_ROW, "note": None}, "unknown_feature", "row 1, feature 'note': unknown feature"),
    # a feature left out or sent as null: a missing value
    ({k: v for k, v in TYPICAL_ROW.items() if k != FIRST}, "missing_value",
     f"row 1, feature {FIRST!r}: missing value"),
    ({**TYPICAL_ROW, FIRST: None}, "missing_value", f"row 1, feature {FIRST!r}: missing value"),
    ([None, *ARRAY[1:]], "missing_value", "row 1, position 0: missing value"),
    # anything else in a value's place: not a number
    ({**TYPICAL_ROW, FIRST: "163"}, "not_a_number", f"row 1, feature {FIRST!r}: not a number"),
    ({**TYPICAL_ROW, FIRST: True}, "not_a_number", f"row 1, feature {FIRST!r}: not a number"),
    ([*ARRAY[:2], [1.0], *ARRAY[3:]], "not_a_number", "row 1, position 2: not a number"),
])
@pytest.mark.parametrize("query", ["", "?version=1"])
def test_one_wording_and_code_per_cause(client, row, code, message, query):
    r = post(client, {"rows": [TYPICAL_ROW, row]}, query)
    assert r.status_code == 422
    err = r.json["error"]
    assert (err["code"], err["message"]) == (code, message)
    assert err["details"]["row"] == 1 and err["details"]["features"] == FEATURES


def test_the_first_faulty_row_is_named_whichever_check_meets_it(client):
    # row 0's unknown numeric field passes the type check; row 1's string does not
    r = post(client, {"rows": [{**TYPICAL_ROW, "q": 1.0}, {**TYPICAL_ROW, FIRST: "x"}]})
    assert r.json["error"]["message"] == "row 0, feature 'q': unknown feature"
