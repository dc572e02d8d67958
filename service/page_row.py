""""Try a row" on a model's page: form fields, the prediction, and its verdict in words.

The prediction goes through the predict route's own code: the form's numbers become the same
JSON body a client would send, :func:`service.answers.parse_body` validates it and
:func:`service.answers.predict_response` computes value, interval and envelope. Only the
wording is added here. Nothing is counted in the request metrics: a person trying rows is not
traffic from the systems the overview's figures describe.
"""

from __future__ import annotations

import time
from collections.abc import Mapping
from dataclasses import dataclass, field

import orjson
from markupsafe import Markup

from service.answers import parse_body, predict_response
from service.envelope import NOVELTY_QUANTILE
from service.errors import ApiError
from service.model import Model
from service.page_data import number
from service.text_safety import html_name

#: Coverage offered in the form when the version stores interval calibration.
DEFAULT_COVERAGE = 0.9


@dataclass
class FeatureField:
    """One labelled input of the form: its training range beside it."""

    key: str  # form field name: f0, f1, … (feature names may be anything a CSV header holds)
    feature: str
    low: str
    high: str
    text: str  # what the field holds: as entered, else the training mean
    error: str | None = None
    choices: tuple[str, ...] = ()  # a text feature's training categories


def form_fields(model: Model, given: Mapping[str, str]) -> list[FeatureField]:
    """A field per feature in model order, filled from ``given`` (the query) or the mean."""
    out = []
    for j, (feature, (c, _)) in enumerate(zip(model.features, model.encoding.slots,
                                               strict=True)):
        key = f"f{j}"
        text = given.get(key)
        choices = tuple(model.encoding.categories.get(feature, ()))
        if choices:  # a text feature: its category, by default the first one
            out.append(FeatureField(key, feature, "", "", (text or choices[0]).strip(),
                                    choices=choices))
            continue
        if text is None:
            text = number(float(model.mean[c]), 4)
        out.append(FeatureField(key, feature, number(float(model.lo[c]), 6),
                                number(float(model.hi[c]), 6), text.strip()))
    return out


def read_numbers(fields: list[FeatureField]) -> dict[str, float | str] | None:
    """The row as {feature: value}; None with ``error`` set on each field that is no number.

    Only the text-to-number step happens here; range, finiteness and size are the predict
    route's checks, applied by :func:`try_row`.
    """
    row, ok = {}, True
    for f in fields:
        if f.choices:  # a text feature's category goes as written
            row[f.feature] = f.text
            continue
        try:
            row[f.feature] = float(f.text)
        except ValueError:
            f.error = "enter a number (a decimal point, not a comma)"
            ok = False
    return row if ok else None


@dataclass
class Outcome:
    """What the page shows after a row was tried."""

    values: list[tuple[str, str, str | None]] = field(default_factory=list)  # target, value,
    # interval text
    coverage: str = ""  # the intervals' nominal coverage, "90 %"
    inside: bool = True
    outside: set[str] = field(default_factory=set)  # features out of their training range
    verdict: list[str] = field(default_factory=list)  # HTML: names isolated (Markup)
    caution: str | None = None
    error: str | None = None
    calibrated: bool = True  # the interval's coverage holds here (row inside the envelope)


def try_row(model: Model, row: dict[str, float | str], coverage: float | None,
            max_rows: int) -> Outcome:
    """Predict one row with the predict route's parsing, validation and computation."""
    body = {"rows": [row]}
    if coverage is not None:
        body["coverage"] = coverage
    t0 = time.perf_counter()
    try:
        # orjson writes a NaN or infinity as null, which the route's validation refuses
        req = parse_body(orjson.dumps(body), max_rows, model.features, model.encoding.any)
        resp, _ = predict_response(model, req, t0, time.perf_counter())
    except ApiError as exc:
        return Outcome(error=exc.message)
    result = resp["results"][0]
    several = len(model.targets) > 1
    values = result["value"] if several else [result["value"]]
    bounds = result.get("interval")
    if bounds is not None and not several:
        bounds = [bounds]
    out = Outcome()
    for j, target in enumerate(model.targets):
        interval = None
        if bounds is not None:
            interval = f"{number(bounds[j][0], 5)} to {number(bounds[j][1], 5)}"
        out.values.append((target, number(values[j], 5), interval))
    if bounds is not None and coverage is not None:
        out.coverage = f"{100 * coverage:g} %"
        out.calibrated = bool(result.get("interval_calibrated", True))
    env = result["envelope"]
    out.inside = env["inside"]
    out.outside = set(env["out_of_range"])
    out.verdict = verdict(env, int(model.neighbours.k))
    out.caution = resp.get("caution")
    return out


def verdict(envelope: dict, k: int) -> list[str]:
    """The envelope report in sentences: which feature is out of range and by how much, and
    how novel the row is (k-th nearest training row distance over the calibrated threshold).

    A line naming a feature is HTML (Markup), the name escaped inside ``<bdi>``, so a
    right-to-left name cannot reorder the figures that follow it; the others are text."""
    pct = f"{100 * NOVELTY_QUANTILE:g} %"
    lines = []
    for feature, flag in envelope["out_of_range"].items():
        value, lo, hi = flag["value"], flag["min"], flag["max"]
        side, by = ("above", value - hi) if value > hi else ("below", lo - value)
        lines.append(Markup("Out of range: {} = {} is {} its training range {} to {} by {}.")
                     .format(html_name(feature), number(value, 6), side, number(lo, 6),
                             number(hi, 6), number(by, 4)))
    for feature, value in (envelope.get("new_category") or {}).items():
        lines.append(Markup("New category: {} = {} was not among the training rows' "
                            "categories.").format(html_name(feature), value))
    score = envelope["novelty"]
    if envelope["novel"]:
        lines.append(f"Novel row: novelty {number(score, 3)}. Its {ordinal(k)} nearest "
                     f"training row is {number(score, 3)} times as far away as the distance "
                     f"within which {pct} of the training rows have theirs: the model has little "
                     "data near this row.")
    else:
        lines.append(f"Not novel: novelty {number(score, 3)} (1 or less means the row is as "
                     f"close to the training rows as {pct} of them are to each other).")
    lines += shape_lines(envelope) + target_lines(envelope)
    if envelope["inside"]:
        lines.insert(0, "Inside the training envelope: no check flagged the row.")
    return lines


def shape_lines(envelope: dict) -> list[str]:
    """T² and Q in words, when the version has the PCA check."""
    lines = []
    if "t2" in envelope:
        t2 = envelope["t2"]
        lines.append(f"Unusual combination: T² is {number(t2, 3)} times its limit; the row "
                     "is far along the training data's main directions of variation."
                     if t2 > 1 else f"T² is {number(t2, 3)} times its limit (1 or less: an "
                     "ordinary combination along the training data's main directions).")
    if "q" in envelope:
        q = envelope["q"]
        lines.append(f"Unfamiliar shape: Q is {number(q, 3)} times its limit; the row does "
                     "not follow the pattern the training rows share across features."
                     if q > 1 else f"Q is {number(q, 3)} times its limit (1 or less: the row "
                     "follows the pattern the training rows share across features).")
    return lines


def target_lines(envelope: dict) -> list[str]:
    """A prediction outside its target's training range, in words (name isolated)."""
    lines = []
    for target, flag in (envelope.get("target_out_of_range") or {}).items():
        lines.append(Markup("Prediction outside the training range: {} = {} (before any "
                            "clipping) against {} to {} in the training data.")
                     .format(html_name(target), number(flag["value"], 6),
                             number(flag["min"], 6), number(flag["max"], 6)))
    return lines


def ordinal(n: int) -> str:
    """1st, 2nd, 3rd, 4th … 11th, 12th, 13th, 21st."""
    suffix = "th" if 10 <= n % 100 <= 20 else {1: "st", 2: "nd", 3: "rd"}.get(n % 10, "th")
    return f"{n}{suffix}"
