"""Readings in (machines), stateless scoring, and the asset listing and score history."""

from __future__ import annotations

import base64
import binascii
import time
from datetime import datetime, timedelta, timezone
from typing import Annotated

import numpy as np
from fastapi import APIRouter, Path, Query, Request, Response

from service.api.deps import DatabaseDep, DbSession, MachineCaller, MaintenanceCaller, MetricsDep, RegistryDep, SettingsDep
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
    parse_body,
)
from service.db import readings as q
from service.errors import BadInput, NotFound, TooLarge
from service.ingest import RawReading, ingest

router = APIRouter(prefix="/v1", tags=["readings"])
# Bodies this router's routes parse themselves (schemas.parse_body); the app adds their
# schemas to the OpenAPI document's components.
SELF_PARSED_BODIES = (ReadingsIn,)

AssetId = Annotated[str, Path(pattern=ASSET_ID_PATTERN, description="1-64 characters of A-Z a-z 0-9 _ . -")]


@router.post(
    "/assets/{asset_id}/readings",
    response_model=ReadingsOut,
    openapi_extra={"requestBody": {"required": True, "content": {"application/json": {"schema": {"$ref": "#/components/schemas/ReadingsIn"}}}}},
)
async def post_readings(
    asset_id: AssetId, request: Request, caller: MachineCaller,
    backfill: Annotated[bool, Query(description="admin keys: score every due window of this history, no lateness limit; its alerts are marked backfilled")] = False,
) -> Response:
    """Store a batch of an asset's readings; score the windows it completes; run the alert rule.

    The body (a ReadingsIn) is parsed and validated by pydantic-core straight from its bytes,
    and the response is the model serialised once: FastAPI's own body handling (the json
    module, then validation of the decoded objects) and response validation cost about as
    much as the rest of the request's Python (bench/ingest.py). Errors read as FastAPI's.
    Runs on the event loop, not in the thread pool: ingest is CPU work, so a worker thread
    would only add hand-overs of the GIL between it and the loop."""
    body = parse_body(ReadingsIn, await request.body())
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
    arr = np.asarray(body.windows, dtype=np.float32).reshape(len(body.windows), m.window, len(m.channels))
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
