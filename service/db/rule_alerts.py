"""Alert rows as the alert rule writes them on ingest: open, extend (last seen, peak),
escalate, return to normal — each transition with its alert_events row (actor "rule").
They work on `AlertRow`s with the compiled statements of service/db/ingest_sql.py, on the
connection of the request's transaction (a session's `connection()` will do).

People's actions on alerts (acknowledge, notes, close) live in service/db/alerts.py.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy import Connection

from service.db import ingest_sql as store
from service.db import outbox
from service.db.ingest_sql import AlertRow

RULE_ACTOR = "rule"


def open_alert(
    conn: Connection, *, asset_id: str, severity: str, at: datetime, score: float, top_channels: list[dict[str, Any]],
    model_id: str, model_version: str, threshold_version_id: int | None, details: dict[str, Any],
    backfilled: bool = False,
) -> AlertRow:
    """Insert the asset's active alert. The UNIQUE active_key makes a concurrent second one fail.
    `backfilled`: opened by a backfill of history (it sends no notification)."""
    alert_id = store.insert_alert(conn, {
        "asset_id": asset_id, "severity": severity, "state": "unacknowledged", "condition": "active",
        "active_key": asset_id, "opened_at": at, "last_seen_at": at, "returned_at": None,
        "peak_score": float(score), "peak_at": at, "top_channels": top_channels,
        "model_id": model_id, "model_version": model_version, "threshold_version_id": threshold_version_id,
        "acknowledged_at": None, "acknowledged_by": None, "closed_at": None, "closed_by": None,
        "outcome": None, "close_note": None, "backfilled": backfilled,
    })
    store.insert_event(conn, alert_id=alert_id, at=at, kind="opened", actor=RULE_ACTOR, details={"severity": severity, **details})
    alert = AlertRow(alert_id, severity, at, float(score), at, top_channels, active_key=asset_id, backfilled=backfilled)
    outbox.enqueue_transition(conn, "opened", alert, at=at, asset_id=asset_id)
    return alert


def extend_alert(alert: AlertRow, *, at: datetime, score: float, top_channels: list[dict[str, Any]]) -> None:
    """A further window while active: last seen moves on, the peak (and its channels) may rise.
    Written with the alert's next change or by `store.save_alert`."""
    alert.last_seen_at = max(alert.last_seen_at, at)
    if score > alert.peak_score:
        alert.peak_score = float(score)
        alert.peak_at = at
        alert.top_channels = top_channels
    alert.dirty = True


def escalate_alert(conn: Connection, alert: AlertRow, *, at: datetime, details: dict[str, Any]) -> None:
    alert.severity = "critical"
    alert.dirty = True
    store.insert_event(conn, alert_id=alert.id, at=at, kind="escalated", actor=RULE_ACTOR, details={"severity": "critical", **details})
    outbox.enqueue_transition(conn, "escalated", alert, at=at)


def return_alert(conn: Connection, alert: AlertRow, *, at: datetime, details: dict[str, Any]) -> None:
    """Written at once: the asset's next alert may open in the same request (UNIQUE active_key)."""
    alert.condition = "returned"
    alert.returned_at = at
    alert.active_key = None
    store.save_returned(conn, alert)
    store.insert_event(conn, alert_id=alert.id, at=at, kind="returned", actor=RULE_ACTOR, details=details)
    outbox.enqueue_transition(conn, "returned", alert, at=at)
