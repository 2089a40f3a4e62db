"""Alert routes: list, detail, acknowledge, close, notes, and alert-system health.

Maintenance keys and above (operator, admin). Every action is written to alert_events and
audit_log with the key's name as the actor (service/db/alerts.py).
"""

from __future__ import annotations

from datetime import datetime, timedelta, timezone
from typing import Annotated

from fastapi import APIRouter, Path, Query
from sqlalchemy.orm import Session

from service.alert_health import chatter_horizon_ms, health
from service import actions
from service.api.deps import DbSession, MaintenanceCaller, RegistryDep, WriteSession
from service.api.schemas_alerts import (
    AcknowledgeIn,
    AlertDetail,
    AlertEventOut,
    AlertHealthOut,
    AlertOut,
    AlertPage,
    CloseIn,
    FigureOut,
    NoteIn,
    UtcIn,
    alert_out,
    threshold_out,
)
from service.db import alerts as q
from service.errors import BadInput, ModelError
from service.models_registry import ModelRegistry

router = APIRouter(prefix="/v1", tags=["alerts"])

# Bounded by the database integer (SQLite and PostgreSQL BIGINT): a larger id is a 422, never a driver overflow.
AlertId = Annotated[int, Path(ge=1, le=2**63 - 1, description="alert id")]
HEALTH_DEFAULT = timedelta(days=7)
CAUTION = (
    "Advisory figures in the spirit of ISA-18.2 / IEC 62682 and EEMUA 191 benchmarks as summarised "
    "in the trade press (common practice); kilter is not a safety system."
)


@router.get("/alerts", response_model=AlertPage)
def list_alerts(
    db: DbSession,
    caller: MaintenanceCaller,
    asset: Annotated[str | None, Query(max_length=64, description="asset id")] = None,
    state: Annotated[str | None, Query(description="unacknowledged | acknowledged | closed")] = None,
    severity: Annotated[str | None, Query(description="warning | critical")] = None,
    condition: Annotated[str | None, Query(description="active | returned")] = None,
    since: Annotated[UtcIn | None, Query(description="alerts whose span meets [since, until)")] = None,
    until: Annotated[UtcIn | None, Query()] = None,
    limit: Annotated[int, Query(ge=1, le=q.MAX_PAGE)] = 50,
    cursor: Annotated[str | None, Query(max_length=200, description="next_cursor of the previous page")] = None,
    sort: Annotated[
        str, Query(description="priority: active, unacknowledged, critical first, newest first within each; newest: by opened_at")
    ] = "priority",
) -> AlertPage:
    rows, next_cursor = q.list_alerts(
        db,
        asset_id=asset,
        state=state,
        severity=severity,
        condition=condition,
        since=since,
        until=until,
        limit=limit,
        cursor=cursor,
        allowed_assets=caller.assets,
        sort=sort,
    )
    warnings = q.warning_levels(db, rows)
    return AlertPage(items=[alert_out(a, warnings.get(a.threshold_version_id or 0)) for a in rows], next_cursor=next_cursor)


@router.get("/alerts/{alert_id}", response_model=AlertDetail)
def get_alert(alert_id: AlertId, db: DbSession, caller: MaintenanceCaller, registry: RegistryDep) -> AlertDetail:
    detail = q.get_alert(db, alert_id=alert_id, allowed_assets=caller.assets)
    return _detail(detail, registry)


def _window_period(registry: RegistryDep, model_id: str) -> float | None:
    try:
        return registry.get(model_id).manifest.window_period_s
    except ModelError:  # the model is no longer served; the rule's times in seconds are then unknown
        return None


def _detail(detail: q.AlertDetail, registry: RegistryDep) -> AlertDetail:
    base = alert_out(detail.alert, detail.threshold.warning if detail.threshold is not None else None)
    threshold = (
        threshold_out(detail.threshold, _window_period(registry, detail.threshold.model_id)) if detail.threshold is not None else None
    )
    history = [AlertEventOut(at=e.at, kind=e.kind, actor=e.actor, note=e.note, details=e.details) for e in detail.events]
    return AlertDetail(**base.model_dump(), threshold=threshold, history=history)


@router.post("/alerts/{alert_id}/acknowledge", response_model=AlertOut)
def acknowledge(alert_id: AlertId, db: WriteSession, caller: MaintenanceCaller, body: AcknowledgeIn | None = None) -> AlertOut:
    alert = actions.acknowledge_alert(db, caller=caller, alert_id=alert_id, note=body.note if body else None)
    out = alert_out(alert, q.warning_levels(db, [alert]).get(alert.threshold_version_id or 0))
    db.commit()
    return out


@router.post("/alerts/{alert_id}/close", response_model=AlertOut)
def close(alert_id: AlertId, body: CloseIn, db: WriteSession, caller: MaintenanceCaller) -> AlertOut:
    alert = actions.close_alert(db, caller=caller, alert_id=alert_id, outcome=body.outcome, note=body.note)
    out = alert_out(alert, q.warning_levels(db, [alert]).get(alert.threshold_version_id or 0))
    db.commit()
    return out


@router.post("/alerts/{alert_id}/notes", response_model=AlertEventOut, status_code=201)
def add_note(alert_id: AlertId, body: NoteIn, db: WriteSession, caller: MaintenanceCaller) -> AlertEventOut:
    event = actions.note_alert(db, caller=caller, alert_id=alert_id, note=body.note)
    out = AlertEventOut(at=event.at, kind=event.kind, actor=event.actor, note=event.note, details=event.details)
    db.commit()
    return out


@router.get("/alert-health", response_model=AlertHealthOut)
def alert_health(
    db: DbSession,
    _caller: MaintenanceCaller,
    registry: RegistryDep,
    since: Annotated[UtcIn | None, Query(description="default: 7 days before until")] = None,
    until: Annotated[UtcIn | None, Query(description="default: the fleet's newest window end, else now")] = None,
    operator_positions: Annotated[int, Query(ge=1, le=1000, description="desks sharing the fleet's alerts")] = 1,
) -> AlertHealthOut:
    return health_report(db, registry, since=since, until=until, operator_positions=operator_positions)


def health_report(
    db: Session, registry: ModelRegistry, *, since: datetime | None, until: datetime | None, operator_positions: int = 1
) -> AlertHealthOut:
    """The alert-system health figures (the endpoint and the dashboard's page answer these)."""
    if until is None:
        newest = q.newest_window_end(db)
        until = q.just_after(q.to_ms(newest)) if newest is not None else datetime.now(timezone.utc)
    if since is None:
        since = until - HEALTH_DEFAULT
    if until <= since:
        raise BadInput("until must be after since", field="query.until")
    # One horizon for the fleet: the widest the served models' default timing gives.
    models = registry.models()
    horizons = [
        (chatter_horizon_ms(m.manifest.window_period_s, m.manifest.alert_rule.on_k, m.manifest.alert_rule.off_m), m) for m in models
    ]
    horizon_ms, widest = max(horizons, key=lambda h: h[0])
    report = health(
        q.health_records(db, since=since, until=until),
        q.asset_spans(db, until=until),
        since_ms=q.to_ms(since),
        until_ms=q.to_ms(until),
        window_period_s=widest.manifest.window_period_s,
        on_k=widest.manifest.alert_rule.on_k,
        off_m=widest.manifest.alert_rule.off_m,
        operator_positions=operator_positions,
    )
    return AlertHealthOut(
        since=since,
        until=until,
        assets=report.assets,
        asset_days=report.asset_days,
        alerts_opened=report.alerts_opened,
        chatter_horizon_s=horizon_ms / 1000,
        figures=[
            FigureOut(
                name=f.name, value=f.value, unit=f.unit, target=f.target, limit=f.limit, verdict=f.verdict, basis=f.basis, detail=f.detail
            )
            for f in report.figures
        ],
        caution=CAUTION,
    )
