"""Request and response shapes (pydantic). The same classes validate requests and generate
``/openapi.json``, so the document cannot drift from what the service accepts."""

from __future__ import annotations

from typing import Annotated

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


class RowBatch(Strict):
    rows: list[ObjectRow | ArrayRow] = Field(
        ..., min_length=1, description="Rows to predict. " + ROW_DOC
    )
    coverage: Annotated[float, Field(gt=0, lt=1, allow_inf_nan=False)] | None = Field(
        None,
        description="Ask for a prediction interval with this nominal coverage, e.g. 0.9.",
    )


class RangeFlag(BaseModel):
    value: float
    min: float
    max: float


class Envelope(BaseModel):
    inside: bool = Field(description="Inside every training range and not novel.")
    out_of_range: dict[str, RangeFlag] = Field(
        description="Features outside their training range, with the training min and max."
    )
    novelty: float = Field(
        description="Distance to the 5th-nearest training row divided by the calibrated "
        "threshold; above 1 means farther than 99 % of training rows are from theirs."
    )
    novel: bool = Field(description="novelty > 1")


class Result(BaseModel):
    value: float | list[float] = Field(description="Prediction in raw units; a list per row "
                                       "when the model has several targets.")
    interval: list[float] | list[list[float]] | None = Field(
        None, description="[lower, upper] (one pair per target) when coverage was asked."
    )
    envelope: Envelope


class Timing(BaseModel):
    parse: float
    compute: float
    total: float


class PredictionBatch(BaseModel):
    model: str
    version: int
    results: list[Result]
    timing_ms: Timing
    caution: str | None = Field(
        None, description="Present when a row lies outside the training envelope."
    )


class ErrorBody(BaseModel):
    code: str = Field(description="Short machine-readable reason, e.g. invalid_row.")
    message: str = Field(description="What is wrong, naming the row and feature at fault.")
    details: list[dict] | dict | None = None


class ErrorResponse(BaseModel):
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


class ReleaseResponse(BaseModel):
    model: str
    time: str
    version: int
    previous: int | None
    action: str


class VersionInfo(BaseModel):
    version: int
    created: str | None
    live: bool
    kernel: str | None
    metrics: dict | None
    fault: str | None = None


class VersionsResponse(BaseModel):
    model: str
    live_version: int | None
    versions: list[VersionInfo]


class ModelEntry(BaseModel):
    name: str
    live_version: int | None
    versions: list[int]


class ModelsResponse(BaseModel):
    models: list[ModelEntry]


class ModelSummary(BaseModel):
    model: str
    version: int
    created: str | None
    features: list[str]
    targets: list[str]
    kernel: dict
    ridge: float
    training_rows: int | None
    metrics: dict | None
    ranges: dict[str, dict[str, float]]
    novelty: dict
    intervals: bool


class Health(BaseModel):
    up: bool


class Readiness(BaseModel):
    ready: bool
    models: dict[str, int | None]
    problems: dict[str, str] = {}
