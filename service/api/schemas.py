"""Request and response models of the readings, scoring and asset endpoints.

Times come in as ISO-8601 with an offset or epoch seconds and go out as ISO-8601 UTC
with "Z". Channel values are JSON numbers or null (missing); NaN and infinity are refused.
"""

from __future__ import annotations

from datetime import datetime, timezone
from typing import Annotated, Any, TypeVar

from pydantic import BaseModel, BeforeValidator, ConfigDict, Field, PlainSerializer, ValidationError, WithJsonSchema
from pydantic_core import PydanticCustomError

from service.grid import TimestampError, parse_timestamp

ASSET_ID_PATTERN = r"^[A-Za-z0-9_.\-]{1,64}$"
M = TypeVar("M", bound=BaseModel)


# Epoch seconds a reading may carry: from 2000-01-01 (946684800) up to the end of year 9999
# (what datetime can represent). Earlier times are refused rather than stored as late: a
# reading dated 1970 comes from a clock that was never set (epoch 0, a reset RTC), and no
# plant historian this service ingests holds sensor data from before 2000. The future side
# is bounded by the server clock in the ingest (future_tolerance_s).
TS_MIN_S, TS_MAX_S = 946684800.0, 253402300799.0


def check_asset_id(value: str) -> str:
    """An asset id names a page and a path segment: not '.', '..' or any other run of dots only."""
    if value and set(value) == {"."}:
        raise PydanticCustomError(
            "asset_id", "{value} is not an asset id: give 1-64 characters of A-Z a-z 0-9 _ . - with at least one that is not a dot",
            {"value": repr(value)},
        )
    return value


JSON_TYPES = ("application/json",)


def require_json(content_type: str | None) -> None:
    """415 for a body declared as anything but JSON (application/json or a +json type); a
    body without a Content-Type is read as JSON."""
    from service.errors import UnsupportedMediaType

    if content_type is None:
        return
    media = content_type.split(";", 1)[0].strip().lower()
    if media in JSON_TYPES or (media.startswith("application/") and media.endswith("+json")):
        return
    raise UnsupportedMediaType(f"the body is declared as {media or 'nothing'!r}; send it as application/json", field="header.content-type")


def _parse_ts(value: object) -> float:
    try:
        ts = parse_timestamp(value)
    except TimestampError as e:
        raise PydanticCustomError("timestamp", str(e)) from e
    if ts < TS_MIN_S:
        raise PydanticCustomError(
            "timestamp", "{value} is before 2000-01-01T00:00:00Z, too old to be a real reading (a clock that was never set?): "
            "give the time it was measured, as epoch seconds or ISO-8601 with offset",
            {"value": repr(value)[:40]},
        )
    if ts > TS_MAX_S:
        raise PydanticCustomError(
            "timestamp", "{value} is outside 2000-01-01T00:00:00Z .. 9999-12-31T23:59:59Z: give epoch seconds or ISO-8601 with offset",
            {"value": repr(value)[:40]},
        )
    return ts


def _z(v: datetime) -> str:
    return v.astimezone(timezone.utc).isoformat().replace("+00:00", "Z")


EpochS = Annotated[
    float,
    BeforeValidator(_parse_ts),
    WithJsonSchema({"anyOf": [{"type": "string", "format": "date-time"}, {"type": "number"}],
                    "description": "ISO-8601 with offset, or epoch seconds"}),
]
Value = Annotated[float, Field(strict=True, allow_inf_nan=False)]
UtcOut = Annotated[datetime, PlainSerializer(_z, return_type=str)]


class _In(BaseModel):
    model_config = ConfigDict(extra="forbid")


class ReadingIn(_In):
    ts: EpochS
    values: dict[str, Value | None] = Field(description="every channel of the asset's model; null = not measured")


class ReadingsIn(_In):
    readings: list[ReadingIn]


class ReadingsOut(BaseModel):
    asset_id: str
    model_id: str
    model_version: str
    accepted: int = Field(description="readings stored by this request")
    duplicates: int = Field(description="readings already stored with the same values (or repeated in the batch)")
    late: int = Field(description="stored readings older than the lateness limit: they start no window")
    windows_scored: int
    gap_windows: int = Field(description="windows not scored because they span a gap longer than the fill policy")
    alerts_opened: int
    alerts_escalated: int
    alerts_returned: int
    threshold_version: int | None
    first_window_end: UtcOut | None
    last_window_end: UtcOut | None


class ScoreIn(_In):
    model_id: str | None = Field(default=None, description="needed only when several models are served")
    windows: list[list[list[Value]]] = Field(description="(batch, window, channels) in raw units, channel order of the manifest")


class ScoreOut(BaseModel):
    model_id: str
    model_version: str
    channels: list[str]
    scores: list[float]
    contributions: list[dict[str, float]]
    warning: float
    critical: float


class AssetOut(BaseModel):
    asset_id: str
    model_id: str
    state: str = Field(description="normal | alerting | shelved | silent")
    created_at: UtcOut
    last_reading_at: UtcOut | None
    last_window_end: UtcOut | None
    last_score: float | None
    warning: float | None
    critical: float | None
    threshold_version: int | None
    shelved_until: UtcOut | None
    shelve_reason: str | None
    active_alert_id: int | None
    active_severity: str | None
    gap_windows: int
    last_gap_end: UtcOut | None


class AssetsPage(BaseModel):
    items: list[AssetOut]
    next_cursor: str | None


class ScorePointOut(BaseModel):
    window_end: UtcOut
    score: float
    contributions: dict[str, float]
    model_id: str
    model_version: str
    threshold_version_id: int | None


class ScoresPage(BaseModel):
    asset_id: str
    since: UtcOut
    until: UtcOut
    items: list[ScorePointOut]
    next_cursor: str | None


def as_dict(obj: Any) -> dict[str, Any]:
    """A dataclass's fields as a dict (for building response models)."""
    return {k: getattr(obj, k) for k in obj.__dataclass_fields__}


def parse_body(model: type[M], raw: bytes) -> M:
    """`raw` as `model`, parsed and validated in one pass by pydantic-core; a 422 as FastAPI
    gives it (locations under "body") when it is not JSON or not valid."""
    from fastapi.exceptions import RequestValidationError

    if not raw.strip():
        raise RequestValidationError([{"type": "missing", "loc": ("body",), "msg": "Field required", "input": None}])
    try:
        return model.model_validate_json(raw)
    except ValidationError as e:
        raise RequestValidationError(
            [{**err, "loc": ("body", *err["loc"])} for err in e.errors(include_url=False)]
        ) from None


def body_schemas(*models: type[BaseModel]) -> dict[str, Any]:
    """OpenAPI component schemas of request bodies a route parses itself (parse_body), so its
    documented requestBody can point at them."""
    out: dict[str, Any] = {}
    for model in models:
        schema = model.model_json_schema(ref_template="#/components/schemas/{model}")
        out.update(schema.pop("$defs", {}))
        out[model.__name__] = schema
    return out
