"""Request bodies in, answers out, for the predict route (framework-free): validate rows
against a model, compute, shape the JSON answer. Messages name the row (0-based, as in the
request) and the feature at fault."""

from __future__ import annotations

import threading
import time

import numpy as np
import orjson
from pydantic import ValidationError

from service.categories import ValueKindError
from service.cautions import OUTSIDE_ENVELOPE
from service.errors import ApiError
from service.intervals import CoverageUnavailable
from service.model import Model
from service.request_body import refuse_before_parsing, too_many_rows
from service.schemas import MAX_ID_CHARS, MAX_INPUT, RowBatch, TextRowBatch

#: One predict request of this process is parsed, computed and serialized at a time
#: (:func:`service.routes.predict.answer`): the worker's threads overlap waiting on slow
#: sockets, never CPU, so workers × engine threads stay within the cores, and a worker
#: holds one request's parsed rows at a time, as the sizing formula assumes.
COMPUTE_SLOT = threading.Lock()


def parse_body(raw: bytes, max_rows: int, features: list[str] | None = None,
               text: bool = False) -> RowBatch:
    """JSON bytes → validated request (structure, strict finite numbers, no extra keys);
    a body with more arrays and objects than ``max_rows`` rows need is refused unparsed.
    With the model's ``features`` a refused row is explained by its cause (see
    :func:`row_fault`). ``text``: the model has text features, whose values are strings
    (:func:`rows_to_array` checks which feature takes which)."""
    refuse_before_parsing(raw, max_rows)
    try:
        data = orjson.loads(raw)
    except orjson.JSONDecodeError as exc:
        raise ApiError(400, "malformed_json",
                       f"request body is not valid JSON ({exc}); NaN and Infinity are not "
                       "JSON numbers") from None
    if not isinstance(data, dict):
        raise ApiError(422, "invalid_request",
                       'request body must be an object like {"rows": [...]}')
    rows = data.get("rows")
    if isinstance(rows, list) and len(rows) > max_rows:
        raise too_many_rows(len(rows), max_rows)
    batch = _plain_batch(data, rows)
    if batch is None:
        try:
            batch = (TextRowBatch if text else RowBatch).model_validate(data)
        except ValidationError as exc:
            raise _explain(exc, rows, None if text else features) from None
    ids = batch.ids
    if ids is not None and len(ids) != len(batch.rows):
        raise ApiError(422, "invalid_ids",
                       f"field 'ids': {len(ids)} ids for {len(batch.rows)} rows; send one "
                       "per row, in row order",
                       {"field": "ids", "ids": len(ids), "rows": len(batch.rows)})
    return batch


_FIELDS = frozenset(("rows", "coverage", "ids"))


def _plain_batch(data: dict, rows) -> RowBatch | None:
    """The common request, held to every rule of :class:`RowBatch` in plain Python (a few
    µs where pydantic's union of row shapes takes about ten); None for anything else, which
    pydantic then checks and explains. Rules: only ``rows``, ``coverage`` and ``ids``; a
    non-empty list of non-empty arrays or objects of numbers (int or float, never bool)
    within ±MAX_INPUT, finite; coverage absent, null or a float strictly between 0 and 1;
    ids absent, null or a list of strings of at most MAX_ID_CHARS characters."""
    if type(rows) is not list or not rows or not _FIELDS.issuperset(data):
        return None
    top = MAX_INPUT
    for row in rows:
        kind = type(row)
        if kind is list:
            values = row
        elif kind is dict:
            values = row.values()
        else:
            return None
        if not values:
            return None
        for v in values:
            kind = type(v)
            # NaN fails both comparisons; JSON has no infinities, but ±inf would fail too
            if (kind is not float and kind is not int) or not -top <= v <= top:
                return None
    coverage = data.get("coverage")
    if coverage is not None and (type(coverage) is not float or not 0.0 < coverage < 1.0):
        return None
    ids = data.get("ids")
    if ids is not None and (type(ids) is not list or not all(
            type(i) is str and len(i) <= MAX_ID_CHARS for i in ids)):
        return None
    return RowBatch.model_construct(rows=rows, coverage=coverage, ids=ids)


#: One wording and one code per cause of a refused row value.
UNKNOWN_FEATURE = ("unknown_feature", "unknown feature")
MISSING_VALUE = ("missing_value", "missing value")
NOT_A_NUMBER = ("not_a_number", "not a number")


def _refused(cause: tuple[str, str], i: int, where: str | int,
             features: list[str]) -> ApiError:
    code, wording = cause
    spot = f"feature {where!r}" if isinstance(where, str) else f"position {where}"
    detail = {"row": i, ("feature" if isinstance(where, str) else "position"): where,
              "message": wording, "features": features}
    return ApiError(422, code, f"row {i}, {spot}: {wording}", detail)


def _value_cause(v) -> tuple[str, str] | None:
    if v is None:
        return MISSING_VALUE
    kind = type(v)
    return None if kind is float or kind is int else NOT_A_NUMBER


def row_fault(i: int, row, features: list[str]) -> ApiError | None:
    """The first fault of row ``i`` by cause, or None: in key order an unknown feature, a
    null (missing value) or a non-number, then a feature the object leaves out (missing
    value). Values out of range and array lengths are checked elsewhere."""
    if isinstance(row, dict):
        known = set(features)
        for key, v in row.items():
            if key not in known:
                return _refused(UNKNOWN_FEATURE, i, key, features)
            cause = _value_cause(v)
            if cause is not None:
                return _refused(cause, i, key, features)
        for f in features:
            if f not in row:
                return _refused(MISSING_VALUE, i, f, features)
    elif isinstance(row, list):
        for k, v in enumerate(row):
            cause = _value_cause(v)
            if cause is not None:
                return _refused(cause, i, k, features)
    return None


def _explain(exc: ValidationError, rows, features: list[str] | None) -> ApiError:
    """Turn pydantic's errors into one message naming row and feature, plus details; with
    ``features`` a row's unknown feature, missing value or non-number is named by its cause
    (the first such row), whatever pydantic met first."""
    if features is not None and isinstance(rows, list):
        for i, row in enumerate(rows):
            fault = row_fault(i, row, features)
            if fault is not None:
                return fault
    details = []
    for err in exc.errors(include_url=False, include_input=False):
        loc = err["loc"]
        if loc and loc[0] == "rows" and len(loc) >= 2 and isinstance(loc[1], int):
            i = loc[1]
            row = rows[i]
            branch = loc[2] if len(loc) > 2 else None
            is_obj = isinstance(row, dict)
            if not isinstance(row, dict | list):
                details.append({"row": i, "message": "a row must be an object or an array"})
                continue
            # pydantic tries both row shapes; keep only errors of the shape the row has
            if (branch or "").startswith("dict") != is_obj:
                continue
            where = loc[3] if len(loc) > 3 else None
            item = {"row": i, "message": err["msg"]}
            if where is not None:
                item["feature" if is_obj else "position"] = where
            details.append(item)
        elif loc and loc[0] == "rows":
            details.append({"field": "rows", "message": err["msg"]})
        elif loc and loc[0] == "ids":
            item = {"field": "ids", "message": "must be a list of strings, one per row"}
            if len(loc) > 1:
                item.update(row=loc[1], message="an id must be a string of at most "
                            f"{MAX_ID_CHARS} characters")
            details.append(item)
        else:
            field = ".".join(str(p) for p in loc) or "body"
            msg = "unknown field" if err["type"] == "extra_forbidden" else err["msg"]
            details.append({"field": field, "message": msg})
    if not details:  # pragma: no cover - pydantic always says something
        details = [{"message": str(exc)}]
    first = details[0]
    if "field" in first:
        spot = f"field {first['field']!r}"
        if "row" in first:
            spot += f", row {first['row']}"
    elif "row" in first:
        spot = f"row {first['row']}"
        if "feature" in first:
            spot += f", feature {first['feature']!r}"
        elif "position" in first:
            spot += f", position {first['position']}"
    else:
        spot = "body"
    code = "invalid_ids" if first.get("field") == "ids" else "invalid_request"
    return ApiError(422, code, f"{spot}: {first['message']}", details)


def rows_to_array(req: RowBatch, model: Model) -> np.ndarray:
    """Rows (objects or arrays) → (m, d) array in the model's feature order: floats, or
    with text features an object array (their categories as strings)."""
    feats = model.features
    d = len(feats)
    out = np.empty((len(req.rows), d), dtype=object if model.encoding.any else np.float64)
    for i, row in enumerate(req.rows):
        if isinstance(row, dict):
            if len(row) != d or any(f not in row for f in feats):
                raise row_fault(i, row, feats)
            out[i] = [row[f] for f in feats]
        else:
            if len(row) != d:
                raise ApiError(422, "invalid_row",
                               f"row {i}: {len(row)} values, the model takes {d} "
                               f"({', '.join(feats)})", {"row": i, "features": feats})
            out[i] = row
    return out


def predict_response(model: Model, req: RowBatch, t_start: float, t_parsed: float):
    """Compute values, envelope and intervals; returns (response dict, compute seconds)."""
    x = rows_to_array(req, model)
    answer = model.answer_rows if model.encoding.any else model.answer
    half = None
    if req.coverage is not None:
        try:
            half = model.half_width(req.coverage)
        except CoverageUnavailable as exc:  # the rule kridge predict refuses by too
            raise ApiError(422, exc.code, str(exc)) from None
    t0 = time.perf_counter()
    try:
        y, env, lower, upper = answer(x, half)
    except ValueKindError as exc:  # a text feature's value not a string, or the reverse
        raise ApiError(422, "invalid_value", str(exc),
                       {"row": exc.row, "feature": exc.feature}) from None
    compute = time.perf_counter() - t0
    if not np.isfinite(y).all():  # JSON would carry it as null, silently
        i = int(np.argwhere(~np.isfinite(y))[0][0])
        raise ApiError(422, "prediction_not_finite",
                       f"row {i}: the prediction overflowed (the kernel value is not finite); "
                       "the row lies far outside the training envelope", {"row": i})
    multi = y.shape[1] > 1
    ids = req.ids
    results = []
    for i in range(y.shape[0]):
        value = y[i].tolist() if multi else float(y[i, 0])
        item: dict = {"value": value} if ids is None else {"id": ids[i], "value": value}
        if lower is not None:
            item["interval"] = (np.column_stack([lower[i], upper[i]]).tolist() if multi
                                else [float(lower[i, 0]), float(upper[i, 0])])
            # the calibration residuals come from rows inside the envelope: outside it
            # nothing says the coverage holds
            item["interval_calibrated"] = env[i]["inside"]
        item["envelope"] = env[i]
        results.append(item)
    resp = {"model": model.name, "version": model.version, "targets": model.targets,
            "results": results}
    if any(not e["inside"] for e in env):
        resp["caution"] = OUTSIDE_ENVELOPE
    resp["timing_ms"] = {
        "parse": round((t_parsed - t_start) * 1e3, 4),
        "compute": round(compute * 1e3, 4),
    }  # the caller adds "total" once the response is complete
    return resp, compute
