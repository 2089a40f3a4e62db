"""Alert rows as the alert rule writes them on ingest: open, extend (last seen, peak),
escalate, return to normal — each transition with its alert_events row (actor "rule").

Two persistences of the same transitions: the ingest path works on `AlertRow`s with the
compiled statements of service/db/ingest_sql.py (`*_row` functions); ORM `Alert` objects
(the other functions) serve code that builds alert history through a session. What a
transition changes is written once (`_opening_values`, `extend_alert`, `_escalated`,
`_returned`) and shared by both.

People's actions on alerts (acknowledge, notes, close) live in service/db/alerts.py.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy import Connection
from sqlalchemy.orm import Session

from service.db.ingest_sql import AlertRow, IngestSQL
from service.db.models import Alert, AlertEvent

RULE_ACTOR = "rule"


def _opening_values(
    *, asset_id: str, severity: str, at: datetime, score: float, top_channels: list[dict[str, Any]],
    model_id: str, model_version: str, threshold_version_id: int | None,
) -> dict[str, Any]:
    """Every column of a newly opened alert (people's columns empty)."""
    return {
        "asset_id": asset_id, "severity": severity, "state": "unacknowledged", "condition": "active",
        "active_key": asset_id, "opened_at": at, "last_seen_at": at, "returned_at": None,
        "peak_score": float(score), "peak_at": at, "top_channels": top_channels,
        "model_id": model_id, "model_version": model_version, "threshold_version_id": threshold_version_id,
        "acknowledged_at": None, "acknowledged_by": None, "closed_at": None, "closed_by": None,
        "outcome": None, "close_note": None,
    }


def extend_alert(alert: Alert | AlertRow, *, at: datetime, score: float, top_channels: list[dict[str, Any]]) -> None:
    """A further window while active: last seen moves on, the peak (and its channels) may rise."""
    alert.last_seen_at = max(alert.last_seen_at, at)
    if score > alert.peak_score:
        alert.peak_score = float(score)
        alert.peak_at = at
        alert.top_channels = top_channels
    if isinstance(alert, AlertRow):
        alert.dirty = True


def _escalated(alert: Alert | AlertRow) -> None:
    alert.severity = "critical"


def _returned(alert: Alert | AlertRow, at: datetime) -> None:
    alert.condition = "returned"
    alert.returned_at = at
    alert.active_key = None


# --- the ingest path: compiled statements on the request's connection ----------------------


def open_alert_row(
    conn: Connection, sql: IngestSQL, *, asset_id: str, severity: str, at: datetime, score: float,
    top_channels: list[dict[str, Any]], model_id: str, model_version: str, threshold_version_id: int | None,
    details: dict[str, Any],
) -> AlertRow:
    """Insert the asset's active alert. The UNIQUE active_key makes a concurrent second one fail."""
    values = _opening_values(asset_id=asset_id, severity=severity, at=at, score=score, top_channels=top_channels,
                             model_id=model_id, model_version=model_version, threshold_version_id=threshold_version_id)
    alert_id = sql.insert_alert(conn, values)
    sql.insert_event(conn, alert_id=alert_id, at=at, kind="opened", actor=RULE_ACTOR, details={"severity": severity, **details})
    return AlertRow(alert_id, severity, at, float(score), at, top_channels, active_key=asset_id)


def escalate_alert_row(conn: Connection, sql: IngestSQL, alert: AlertRow, *, at: datetime, details: dict[str, Any]) -> None:
    _escalated(alert)
    alert.dirty = True
    sql.insert_event(conn, alert_id=alert.id, at=at, kind="escalated", actor=RULE_ACTOR, details={"severity": "critical", **details})


def return_alert_row(conn: Connection, sql: IngestSQL, alert: AlertRow, *, at: datetime, details: dict[str, Any]) -> None:
    """Written at once: the asset's next alert may open in the same request (UNIQUE active_key)."""
    _returned(alert, at)
    sql.save_alert(conn, alert)
    sql.insert_event(conn, alert_id=alert.id, at=at, kind="returned", actor=RULE_ACTOR, details=details)


# --- through an ORM session ------------------------------------------------------------------


def open_alert(
    session: Session, *, asset_id: str, severity: str, at: datetime, score: float, top_channels: list[dict[str, Any]],
    model_id: str, model_version: str, threshold_version_id: int | None, details: dict[str, Any],
) -> Alert:
    """Insert the asset's active alert. The UNIQUE active_key makes a concurrent second one fail."""
    alert = Alert(**_opening_values(asset_id=asset_id, severity=severity, at=at, score=score, top_channels=top_channels,
                                    model_id=model_id, model_version=model_version, threshold_version_id=threshold_version_id))
    session.add(alert)
    session.flush()
    session.add(AlertEvent(alert_id=alert.id, at=at, kind="opened", actor=RULE_ACTOR, details={"severity": severity, **details}))
    return alert


def escalate_alert(session: Session, alert: Alert, *, at: datetime, details: dict[str, Any]) -> None:
    _escalated(alert)
    session.add(AlertEvent(alert_id=alert.id, at=at, kind="escalated", actor=RULE_ACTOR, details={"severity": "critical", **details}))


def return_alert(session: Session, alert: Alert, *, at: datetime, details: dict[str, Any]) -> None:
    _returned(alert, at)
    session.add(AlertEvent(alert_id=alert.id, at=at, kind="returned", actor=RULE_ACTOR, details=details))
