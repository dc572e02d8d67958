"""The plain-Python check of common predict bodies never accepts what pydantic refuses.

``service.answers._plain_batch`` takes the common request without pydantic; anything it does
not recognise goes to ``RowBatch.model_validate``. Property: whenever it accepts a body,
pydantic accepts the same body with the same rows and coverage (hypothesis generates bodies
near the valid shape: numbers of every kind, booleans, strings, nulls, empty and nested rows,
unknown keys)."""

from __future__ import annotations

import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pydantic import ValidationError

from service.answers import _plain_batch, parse_body
from service.schemas import MAX_INPUT, RowBatch

numbers = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True),
    st.floats(min_value=-2 * MAX_INPUT, max_value=2 * MAX_INPUT),
    st.integers(min_value=-(10**14), max_value=10**14),
    st.sampled_from([MAX_INPUT, -MAX_INPUT, int(MAX_INPUT), int(MAX_INPUT) + 1, 0, -0.0]),
)
cells = st.one_of(numbers, st.booleans(), st.none(), st.text(max_size=3),
                  st.lists(numbers, max_size=2))
rows = st.one_of(
    st.lists(cells, max_size=4),
    st.lists(numbers, min_size=1, max_size=4),
    st.dictionaries(st.sampled_from(["a", "b", "c"]), cells, max_size=3),
    st.dictionaries(st.sampled_from(["a", "b", "c"]), numbers, min_size=1, max_size=3),
    numbers, st.none(), st.text(max_size=2),
)
bodies = st.fixed_dictionaries(
    {"rows": st.one_of(st.lists(rows, max_size=3), rows)},
    optional={"coverage": st.one_of(numbers, st.none(), st.booleans(), st.text(max_size=2)),
              "extra": st.integers()},
)


@settings(max_examples=3000, deadline=None)
@given(bodies)
def test_plain_check_accepts_only_what_pydantic_accepts(body):
    quick = _plain_batch(body, body.get("rows"))
    if quick is None:
        return
    full = RowBatch.model_validate(body)  # raises if pydantic refuses: a dropped check
    assert full.coverage == quick.coverage
    assert len(full.rows) == len(quick.rows)
    for a, b in zip(full.rows, quick.rows, strict=True):
        assert type(a) is type(b)
        assert list(a) == list(b)  # keys of objects, or the values of arrays
        values_a = a.values() if isinstance(a, dict) else a
        values_b = b.values() if isinstance(b, dict) else b
        assert all(x == y and math.isfinite(x) for x, y in zip(values_a, values_b, strict=True))


@pytest.mark.parametrize("raw", [
    b'{"rows": [[1.5, 2, -3e3]]}',
    b'{"rows": [{"a": 1.0, "b": 2}], "coverage": 0.9}',
    b'{"rows": [[1.0], [2.0]], "coverage": null}',
])
def test_common_bodies_take_the_plain_check(raw):
    import orjson

    data = orjson.loads(raw)
    assert _plain_batch(data, data["rows"]) is not None
    assert parse_body(raw, 100).rows == RowBatch.model_validate(data).rows


@pytest.mark.parametrize("raw", [
    b'{"rows": [[true]]}', b'{"rows": [[1e13]]}', b'{"rows": []}', b'{"rows": [[]]}',
    b'{"rows": [{}]}', b'{"rows": [[1.0]], "coverage": 1.0}', b'{"rows": [[1.0]], "x": 1}',
    b'{"rows": [["1"]]}', b'{"rows": [[1.0]], "coverage": true}',
])
def test_bad_bodies_still_refused_by_pydantic(raw):
    from service.errors import ApiError

    with pytest.raises(ApiError) as err:
        parse_body(raw, 100)
    assert err.value.status == 422
    with pytest.raises(ValidationError):
        import orjson

        RowBatch.model_validate(orjson.loads(raw))
