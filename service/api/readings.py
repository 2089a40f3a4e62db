"""Readings in (machines), stateless scoring, and the asset listing and score history."""

from __future__ import annotations

import base64
import binascii
import time
from datetime import datetime, timedelta, timezone
from typing import Annotated

import numpy as np
from fastapi import APIRouter, Path, Query, Request, Response
from starlette.concurrency import run_in_threadpool
from pydantic import AfterValidator

from service.api.deps import DatabaseDep, DbSession, MachineCaller, MaintenanceCaller, MetricsDep, RegistryDep, SettingsDep
from service.caller import Caller
from service.api.schemas import (
    ASSET_ID_PATTERN,
    AssetOut,
    AssetsPage,
    ReadingsIn,
    ReadingsOut,
    ScoreIn,
    ScoreOut,
    ScorePointOut,
    ScoresPage,
    as_dict,
    check_asset_id,
    parse_body,
    require_json,
)
from service.db import readings as q
from service.errors import BadInput, NotFound, TooLarge
from service.ingest import RawReading, ingest
from service.scoring import first_implausible, implausible_message

router = APIRouter(prefix="/v1", tags=["readings"])
# Bodies this router's routes parse themselves (schemas.parse_body); the app adds their
# schemas to the OpenAPI document's components.
SELF_PARSED_BODIES = (ReadingsIn,)

AssetId = Annotated[str, Path(pattern=ASSET_ID_PATTERN, description="1-64 characters of A-Z a-z 0-9 _ . -, not dots only"),
                    AfterValidator(check_asset_id)]


# The bundled demo model's channels (models/booster-pumps/1); another model has its own.
READINGS_EXAMPLE = {
    "readings": [
        {"ts": "2026-10-13T09:00:00Z", "values": {"flow_m3h": 212.5, "suction_kpa": 148.0, "discharge_kpa": 418.0,
                                                 "current_a": 61.2, "bearing_temp_c": 47.5, "vibration_mm_s": 1.9}},
        {"ts": 1791882060, "values": {"flow_m3h": 211.9, "suction_kpa": 147.6, "discharge_kpa": None,
                                   "current_a": 61.0, "bearing_temp_c": 47.6, "vibration_mm_s": 2.0}},
    ]
}


@router.post(
    "/assets/{asset_id}/readings",
    response_model=ReadingsOut,
    summary="Post an asset's readings",
    openapi_extra={"requestBody": {"required": True, "content": {"application/json": {
        "schema": {"$ref": "#/components/schemas/ReadingsIn"}, "example": READINGS_EXAMPLE}}}},
)
async def post_readings(
    asset_id: AssetId, request: Request, caller: MachineCaller,
    backfill: Annotated[bool, Query(description="admin keys: score every due window of this history, no lateness limit; its alerts are marked backfilled")] = False,
) -> Response:
    """Send one batch of an asset's readings, oldest or newest first, up to
    KILTER_MAX_BATCH_READINGS per post. Each reading has a time (`ts`: ISO-8601 with an
    offset, or epoch seconds) and a value for every channel of the asset's model (`null`
    when a channel was not measured). The example uses the bundled demo model's channels;
    `GET /v1/models` lists each served model's.

    The answer counts the readings `accepted` and the `duplicates` (a reading already
    stored with the same values; sending a batch again is safe), the windows scored by
    this batch and the alerts it opened. Nothing is stored when the batch is refused: a
    422 names the first bad field, a 409 a reading already stored with other values.
    A new asset is created on its first post."""
    # Only the body is awaited on the event loop; parsing, ingest and the answer run in the
    # thread pool in one hop (DEVELOPERS.md, "The event loop stays free").
    require_json(request.headers.get("content-type"))
    raw = await request.body()
    return await run_in_threadpool(_post_readings, request, asset_id, caller, raw, backfill)


def _post_readings(request: Request, asset_id: str, caller: Caller, raw: bytes, backfill: bool) -> Response:
    body = parse_body(ReadingsIn, raw)
    state = request.app.state
    result = ingest(
        db=state.db, registry=state.registry, settings=state.settings, metrics=state.metrics, caller=caller, asset_id=asset_id,
        readings=[RawReading(r.ts, r.values) for r in body.readings], backfill=backfill,
    )
    out = ReadingsOut(**{k: v for k, v in as_dict(result).items() if k in ReadingsOut.model_fields})
    return Response(out.model_dump_json(), media_type="application/json")


@router.post("/score", response_model=ScoreOut)
def score_windows(body: ScoreIn, caller: MachineCaller, registry: RegistryDep, settings: SettingsDep, metrics: MetricsDep) -> ScoreOut:
    """Score windows given in the body with the served model; nothing is stored."""
    if len(body.windows) > settings.max_score_windows:
        raise TooLarge(f"{len(body.windows)} windows in one request; at most {settings.max_score_windows}", field="body.windows")
    if body.model_id is None:
        served = registry.models()
        if len(served) != 1:
            raise BadInput(f"several models are served ({', '.join(m.model_id for m in served)}): give model_id", field="body.model_id")
        model = served[0]
    else:
        model = registry.get(body.model_id)
    m = model.manifest
    for b, win in enumerate(body.windows):
        if len(win) != m.window:
            raise BadInput(f"body.windows[{b}]: {len(win)} steps; this model takes windows of {m.window}", field=f"body.windows[{b}]")
        for t, row in enumerate(win):
            if len(row) != len(m.channels):
                raise BadInput(
                    f"body.windows[{b}][{t}]: {len(row)} values; give {len(m.channels)} in the order {', '.join(model.channels)}",
                    field=f"body.windows[{b}][{t}]",
                )
    arr = np.asarray(body.windows, dtype=np.float64).reshape(len(body.windows), m.window, len(m.channels))
    bad = first_implausible(arr, m)
    if bad is not None:
        b, t, c = bad
        raise BadInput(f"body.windows[{b}][{t}][{c}]: {implausible_message(float(arr[b, t, c]), c, m)}", field=f"body.windows[{b}][{t}][{c}]")
    arr = arr.astype(np.float32)
    t0 = time.perf_counter()
    result = model.scorer.score(arr)
    metrics.scoring_seconds.observe(time.perf_counter() - t0)
    return ScoreOut(
        model_id=model.model_id,
        model_version=model.version,
        channels=model.channels,
        scores=[float(s) for s in result.score],
        contributions=[{c: round(float(x), 6) for c, x in zip(model.channels, row)} for row in result.contributions],
        warning=m.thresholds.warning,
        critical=m.thresholds.critical,
    )


def _encode(text: str) -> str:
    return base64.urlsafe_b64encode(text.encode()).decode().rstrip("=")


def _decode(cursor: str, field: str) -> str:
    try:
        return base64.urlsafe_b64decode(cursor + "=" * (-len(cursor) % 4)).decode()
    except (binascii.Error, UnicodeDecodeError, ValueError) as e:
        raise BadInput("cursor is not one this service gave out; start again without it", field=field) from e


@router.get("/assets", response_model=AssetsPage)
def list_assets(
    caller: MaintenanceCaller, session: DbSession, registry: RegistryDep, settings: SettingsDep,
    cursor: str | None = None, limit: Annotated[int, Query(ge=1, le=1000)] = 200,
) -> AssetsPage:
    """Assets with their state (normal, alerting, shelved, silent), last reading and last score."""
    after = _decode(cursor, "query.cursor") if cursor else None
    silent = {m.model_id: settings.silent_after_windows * m.manifest.window_period_s for m in registry.models()}
    rows = q.list_assets(session, now=datetime.now(timezone.utc), silent_after_s=silent, after=after, limit=limit + 1)
    items = [AssetOut(**as_dict(r)) for r in rows[:limit]]
    return AssetsPage(items=items, next_cursor=_encode(rows[limit - 1].asset_id) if len(rows) > limit else None)


def _aware(value: datetime | None, field: str) -> datetime | None:
    if value is not None and value.tzinfo is None:
        raise BadInput(f"{field}: give a UTC offset, e.g. 2026-10-14T08:00:00Z", field=field)
    return value.astimezone(timezone.utc) if value is not None else None


@router.get("/assets/{asset_id}/scores", response_model=ScoresPage)
def asset_scores(
    asset_id: AssetId, caller: MaintenanceCaller, session: DbSession,
    since: datetime | None = None, until: datetime | None = None, cursor: str | None = None,
    limit: Annotated[int, Query(ge=1, le=10000)] = 2000,
) -> ScoresPage:
    """Window scores and per-channel contributions, oldest first; default: the asset's last 24 h of windows."""
    asset = q.get_asset(session, asset_id=asset_id)
    if asset is None:
        raise NotFound(f"no asset {asset_id!r}", field="path.asset_id")
    since, until = _aware(since, "query.since"), _aware(until, "query.until")
    if until is None:
        last = q.ms_to_dt(asset.last_window_end_ms) if asset.last_window_end_ms is not None else datetime.now(timezone.utc)
        until = last + timedelta(milliseconds=1)
    if since is None:
        since = until - timedelta(hours=24)
    if since >= until:
        raise BadInput("query.since must be before query.until", field="query.since")
    after = None
    if cursor:
        try:
            ms, row_id = _decode(cursor, "query.cursor").split(":")
            after = (int(ms), int(row_id))
        except ValueError as e:
            raise BadInput("cursor is not one this service gave out; start again without it", field="query.cursor") from e
    points = q.asset_scores(session, asset_id=asset_id, since=since, until=until, after=after, limit=limit + 1)
    items = [ScorePointOut(**{k: v for k, v in as_dict(p).items() if k not in ("window_end_index", "id")}) for p in points[:limit]]
    # The cursor is the page's order key (window end, row id), so no row is skipped or repeated.
    last = points[limit - 1] if len(points) > limit else None
    nxt = _encode(f"{q.dt_to_ms(last.window_end)}:{last.id}") if last is not None else None
    return ScoresPage(asset_id=asset_id, since=since, until=until, items=items, next_cursor=nxt)
