"""Alert rows as the alert rule writes them on ingest: open, extend (last seen, peak),
escalate, return to normal — each transition with its alert_events row (actor "rule").

People's actions on alerts (acknowledge, notes, close) live in service/db/alerts.py.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy.orm import Session

from service.db.models import Alert, AlertEvent

RULE_ACTOR = "rule"


def open_alert(
    session: Session,
    *,
    asset_id: str,
    severity: str,
    at: datetime,
    score: float,
    top_channels: list[dict[str, Any]],
    model_id: str,
    model_version: str,
    threshold_version_id: int | None,
    details: dict[str, Any],
) -> Alert:
    """Insert the asset's active alert. The UNIQUE active_key makes a concurrent second one fail."""
    alert = Alert(
        asset_id=asset_id,
        severity=severity,
        state="unacknowledged",
        condition="active",
        active_key=asset_id,
        opened_at=at,
        last_seen_at=at,
        peak_score=float(score),
        peak_at=at,
        top_channels=top_channels,
        model_id=model_id,
        model_version=model_version,
        threshold_version_id=threshold_version_id,
    )
    session.add(alert)
    session.flush()
    session.add(AlertEvent(alert_id=alert.id, at=at, kind="opened", actor=RULE_ACTOR, details={"severity": severity, **details}))
    return alert


def extend_alert(alert: Alert, *, at: datetime, score: float, top_channels: list[dict[str, Any]]) -> None:
    """A further window while active: last seen moves on, the peak (and its channels) may rise."""
    alert.last_seen_at = max(alert.last_seen_at, at)
    if score > alert.peak_score:
        alert.peak_score = float(score)
        alert.peak_at = at
        alert.top_channels = top_channels


def escalate_alert(session: Session, alert: Alert, *, at: datetime, details: dict[str, Any]) -> None:
    alert.severity = "critical"
    session.add(AlertEvent(alert_id=alert.id, at=at, kind="escalated", actor=RULE_ACTOR, details={"severity": "critical", **details}))


def return_alert(session: Session, alert: Alert, *, at: datetime, details: dict[str, Any]) -> None:
    alert.condition = "returned"
    alert.returned_at = at
    alert.active_key = None
    session.add(AlertEvent(alert_id=alert.id, at=at, kind="returned", actor=RULE_ACTOR, details=details))
