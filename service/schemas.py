"""Request and answer shapes (pydantic), the one source of ``/openapi.json``'s schemas.

Requests are validated by these classes; every answer but the predict route's is built
through them (:func:`service.routes.model_response`), so the document cannot drift from what
the service accepts or says. The predict answer is shaped by :mod:`service.answers` on the
hot path without pydantic; a test holds real answers to the generated schema. Answers are
closed (``additionalProperties: false``): a field a route adds must be declared here first.
Fields with a default are the ones an answer may leave out.
"""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import BaseModel, BeforeValidator, ConfigDict, Field

#: Largest magnitude of an input value. Far beyond any measurement, but small enough that
#: standardized values, their squares and kernel sums stay finite in float64 and float32
#: (a value near 1e308 made the novelty score overflow to a JSON null).
MAX_INPUT = 1e12

#: A finite JSON number; booleans and strings are refused (strict mode).
Number = Annotated[float, Field(strict=True, allow_inf_nan=False, ge=-MAX_INPUT, le=MAX_INPUT)]

ROW_DOC = (
    "One input row: an object keyed by feature name, or an array of numbers in the model's "
    "feature order (see GET /models/{name})."
)


class Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True)


#: A row names at least one feature (the model then says which are missing).
ObjectRow = Annotated[dict[str, Number], Field(min_length=1)]
ArrayRow = Annotated[list[Number], Field(min_length=1)]


#: A text feature's category, as a row carries it (:mod:`service.categories`).
Category = Annotated[str, Field(max_length=200)]
TextObjectRow = Annotated[dict[str, Number | Category], Field(min_length=1)]
TextArrayRow = Annotated[list[Number | Category], Field(min_length=1)]


#: Longest row identifier: room for a UUID, a sample code or a path-like key.
MAX_ID_CHARS = 200
RowId = Annotated[str, Field(max_length=MAX_ID_CHARS)]


class RowBatch(Strict):
    rows: list[ObjectRow | ArrayRow] = Field(
        ..., min_length=1, description="Rows to predict. " + ROW_DOC
    )
    coverage: Annotated[float, Field(gt=0, lt=1, allow_inf_nan=False)] | None = Field(
        None,
        description="Ask for a prediction interval with this nominal coverage, e.g. 0.9.",
    )
    ids: list[RowId] | None = Field(
        None, description="One identifier per row, in row order; each comes back as its "
        "result's id. As many as there are rows.",
    )


class TextRowBatch(RowBatch):
    """A request to a model with text features: a row's text feature holds its category."""

    rows: list[TextObjectRow | TextArrayRow] = Field(
        ..., min_length=1, description="Rows to predict. " + ROW_DOC
        + " A text feature's value is its category as a string.")


class Answer(BaseModel):
    """An answer's shape: no undeclared field (the route fails its test, not the client)."""

    model_config = ConfigDict(extra="forbid")


class RangeFlag(Answer):
    value: float
    min: float
    max: float


class Envelope(Answer):
    inside: bool = Field(description="No check flagged the row (flagged_by is empty).")
    out_of_range: dict[str, RangeFlag] = Field(
        description="Features outside their training range, with the training min and max."
    )
    novelty: float = Field(
        description="Distance to the 5th-nearest training row divided by the calibrated "
        "threshold; above 1 means farther than 99 % of training rows are from theirs."
    )
    novel: bool = Field(description="novelty > 1")
    new_category: dict[str, str] | None = Field(
        None, description="Text features whose category the training rows never had "
        "(feature: value); such a row is not inside.")
    t2: float | None = Field(
        None, description="Hotelling's T² of the row in the training rows' principal "
        "components divided by its 0.99 control limit; above 1 flags an unusual combination "
        "within the training data's main directions. Absent for versions without the check.")
    q: float | None = Field(
        None, description="Squared residual off the principal components (Q, SPE) divided by "
        "its 0.99 control limit; above 1 flags a row whose shape the training rows never "
        "had (e.g. a reversed or ramped profile). Absent for versions without the check.")
    target_out_of_range: dict[str, RangeFlag] | None = Field(
        None, description="Targets whose (unclipped) prediction lies outside the target's "
        "training range, with that range. Absent for versions that store no target ranges.")
    flagged_by: list[Literal["range", "novelty", "t2", "q", "target_range", "category"]] = Field(
        description="Every check that flagged the row (category: a text feature's category "
        "never seen in training); empty when inside.")


class Result(Answer):
    id: str | None = Field(None, description="The row's entry of the request's ids, when "
                           "it sent them.")
    value: float | list[float] = Field(description="Prediction in raw units; a list per row "
                                       "when the model has several targets. Clipped to the "
                                       "version's target bounds when it has them.")
    interval: list[float] | list[list[float]] | None = Field(
        None, description="[lower, upper] (one pair per target) when coverage was asked; "
        "clipped to the version's target bounds when it has them."
    )
    interval_calibrated: bool | None = Field(
        None, description="With an interval: true when the row is inside the envelope; false "
        "when a check flagged it, where the interval keeps its usual width but its coverage "
        "was never measured.")
    envelope: Envelope


class Timing(Answer):
    parse: float = Field(description="Milliseconds reading and checking the body.")
    compute: float = Field(description="Milliseconds computing predictions and envelope.")
    total: float = Field(description="Milliseconds from the request's start to the answer.")


class PredictionBatch(Answer):
    model: str
    version: int
    targets: list[str] = Field(description="The target names, in the order of each "
                               "result's value list (one name when the value is a number).")
    results: list[Result]
    timing_ms: Timing
    caution: str | None = Field(
        None, description="Present when a row lies outside the training envelope."
    )


class ErrorBody(Answer):
    code: str = Field(description="Short machine-readable reason, e.g. invalid_row.")
    message: str = Field(description="What is wrong, naming the row and feature at fault.")
    details: list[dict[str, Any]] | dict[str, Any] | None = Field(
        description="What the message names, field by field (row, feature, allowed values).")


class ErrorResponse(Answer):
    error: ErrorBody


def _whole_number(value):
    """JSON Schema counts 173469.0 as an integer; so does the service (never a bool)."""
    if isinstance(value, float) and value.is_integer():
        return int(value)
    return value


#: Version numbers as the store writes them: 1 to 999,999,999.
MAX_VERSION = 999_999_999


class ReleaseRequest(Strict):
    version: Annotated[int, Field(ge=1, le=MAX_VERSION), BeforeValidator(_whole_number)]


class ReleaseResponse(Answer):
    """The history record the release or rollback wrote, with the model's name."""

    model: str
    time: str
    action: Literal["release", "rollback"]
    version: int
    previous: int | None
    repaired: str | None = Field(
        None, description="Present when the release repaired a damaged live.json or history.")
    restart: bool | None = Field(
        None, description="Present (true) when rollback starts anew from this record.")


class VersionInfo(Answer):
    version: int
    created: str | None
    live: bool
    kernel: str | None
    metrics: dict[str, Any] | None
    fault: str | None = Field(
        None, description="Present when the version's manifest cannot be read: why.")


class VersionsResponse(Answer):
    model: str
    live_version: int | None
    versions: list[VersionInfo]


class ModelEntry(Answer):
    name: str
    live_version: int | None
    versions: list[int]


class ModelsResponse(Answer):
    models: list[ModelEntry]


class KernelInfo(Answer):
    name: str
    params: dict[str, int | float] = Field(description="gamma, degree, coef0 as the kernel "
                                           "takes them (README, Concepts).")


class Range(Answer):
    min: float
    max: float


class TargetKernelInfo(Answer):
    target: str
    kernel: KernelInfo
    ridge: float | None


class ModelSummary(Answer):
    model: str
    version: int
    created: str | None
    features: list[str]
    targets: list[str]
    kernel: KernelInfo | None = Field(description="The kernel every target shares; null when "
                                      "targets have kernels of their own (per_target).")
    ridge: float | None = Field(description="The ridge every target shares; null when "
                                "targets have ridges of their own (per_target).")
    per_target: list[TargetKernelInfo] = Field(description="Each target's kernel and ridge, "
                                               "in target order.")
    training_rows: int | None
    metrics: dict[str, Any] | None
    ranges: dict[str, Range] = Field(description="Each feature's training range.")
    novelty: dict[str, Any] = Field(description="How the novelty score is calibrated.")
    shape_check: dict[str, Any] | None = Field(
        None, description="The PCA check behind t2 and q: components kept and the rule, "
        "their variances, both control limits and their formulas. Absent for versions "
        "trained without it.")
    target_ranges: dict[str, Range] | None = Field(
        None, description="Each target's training range, behind target_out_of_range.")
    target_bounds: dict[str, dict[str, float | None]] | None = Field(
        None, description="Bounds from kridge train --target-range that predictions and "
        "interval ends are clipped to, per target: low and high (null: no bound).")
    intervals: bool = Field(description="Whether the version can answer a coverage.")


class Health(Answer):
    up: bool


class Readiness(Answer):
    ready: bool = Field(description="Every live model is served at its live version and no "
                        "drain is running.")
    draining: bool = Field(description="A SIGTERM drain is running: still answering, but "
                           "the balancer should send no more.")
    models: dict[str, int | None] = Field(description="The version each model is served at.")
    problems: dict[str, str] = Field(description="Why a model is not ready, by name.")
