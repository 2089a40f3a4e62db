"""Alert queries: list with keyset pagination, detail, and the people's actions
(acknowledge, close with outcome, note), each recorded in alert_events and audit_log.

State machine (shared service brief, "Alert states"): `condition` is the rule's
(active -> returned); `state` is what people did (unacknowledged -> acknowledged ->
closed). Closing an unacknowledged alert acknowledges it implicitly; closing one whose
condition is still active also clears `active_key`, so the rule may open a new alert for
the asset later. Acknowledging twice, or acting on a closed alert, is a Conflict carrying
the current state. Notes may be added in any state.

Callers commit: these functions only add and flush, so a route's work is one transaction.
"""

from __future__ import annotations

import base64
import binascii
import json
from collections.abc import Collection, Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from typing import Any

from sqlalchemy import and_, case, func, or_, select
from sqlalchemy.orm import Session

from service.alert_health import AlertRecord, AssetSpan
from service.db.models import ALERT_STATES, CONDITIONS, OUTCOMES, SEVERITIES, Alert, AlertEvent, Asset, AuditLog, ThresholdVersion, WindowScore
from service.errors import BadInput, Conflict, NotFound

MAX_PAGE = 200
SORTS = ("priority", "newest")
_EPOCH = datetime(1970, 1, 1, tzinfo=timezone.utc)


def to_ms(t: datetime) -> int:
    """Epoch milliseconds of an aware datetime."""
    return int(round((t - _EPOCH).total_seconds() * 1000))


def from_ms(ms: int) -> datetime:
    return datetime.fromtimestamp(ms / 1000, tz=timezone.utc)


def _to_us(t: datetime) -> int:
    delta = t - _EPOCH
    return (delta.days * 86400 + delta.seconds) * 1_000_000 + delta.microseconds


def encode_cursor(opened_at: datetime, alert_id: int, rank: int | None = None) -> str:
    """Opaque keyset cursor: base64 of (opened_at in epoch microseconds, id), with the
    priority rank in front when the list is sorted by priority."""
    key = [_to_us(opened_at), int(alert_id)] if rank is None else [int(rank), _to_us(opened_at), int(alert_id)]
    raw = json.dumps(key, separators=(",", ":")).encode()
    return base64.urlsafe_b64encode(raw).decode().rstrip("=")


def decode_cursor(cursor: str, *, ranked: bool = False) -> tuple[int | None, datetime, int]:
    """(rank or None, opened_at, id) of a cursor; BadInput if it is not one of this sort's."""
    try:
        raw = base64.urlsafe_b64decode(cursor + "=" * (-len(cursor) % 4))
        key = json.loads(raw)
        if not isinstance(key, list) or len(key) != (3 if ranked else 2) or not all(isinstance(k, int) for k in key):
            raise ValueError
        rank = key.pop(0) if ranked else None
        us, alert_id = key
        return rank, _EPOCH + timedelta(microseconds=us), alert_id
    except (ValueError, TypeError, binascii.Error, json.JSONDecodeError):
        raise BadInput(
            "cursor is not one this service issued for this sort: pass next_cursor from the previous page unchanged", field="query.cursor"
        ) from None


def priority_rank() -> Any:
    """What needs someone first, as one integer (0 first): not closed before closed, then
    active before returned, unacknowledged before acknowledged, critical before warning.
    A closed alert ranks 8 whatever its condition and severity."""
    return case(
        (Alert.state == "closed", 8),
        else_=case((Alert.condition == "active", 0), else_=4)
        + case((Alert.state == "unacknowledged", 0), else_=2)
        + case((Alert.severity == "critical", 0), else_=1),
    )


def _check_choice(value: str | None, allowed: Sequence[str], field: str) -> None:
    if value is not None and value not in allowed:
        raise BadInput(f"{field} must be one of {', '.join(allowed)}, got {value!r}", field=f"query.{field}")


def list_alerts(
    session: Session,
    *,
    asset_id: str | None = None,
    state: str | None = None,
    severity: str | None = None,
    condition: str | None = None,
    since: datetime | None = None,
    until: datetime | None = None,
    limit: int = 50,
    cursor: str | None = None,
    allowed_assets: Collection[str] | None = None,
    sort: str = "priority",
) -> tuple[list[Alert], str | None]:
    """One page of alerts and the next cursor. `sort="priority"` (the default): what needs
    someone first (priority_rank: active unacknowledged critical first), newest first within
    a rank; `sort="newest"`: opened_at, then id, descending.

    `since`/`until` keep alerts whose span [opened_at, last_seen_at] meets [since, until).
    Keyset pagination: a page starts strictly after the cursor's (opened_at, id), so alerts
    that arrive between page fetches never shift or repeat the rows of later pages.
    `allowed_assets` (a caller limited to assets) narrows the list; None means every asset.
    An alert whose rank changes between page fetches (acknowledged, returned) moves to its
    new place: it may then be seen twice or not at all in one walk of the priority order.
    """
    _check_choice(sort, SORTS, "sort")
    _check_choice(state, ALERT_STATES, "state")
    _check_choice(severity, SEVERITIES, "severity")
    _check_choice(condition, CONDITIONS, "condition")
    if not 1 <= limit <= MAX_PAGE:
        raise BadInput(f"limit must be 1..{MAX_PAGE}, got {limit}", field="query.limit")
    if since is not None and until is not None and until <= since:
        raise BadInput("until must be after since", field="query.until")
    q = select(Alert)
    if asset_id is not None:
        q = q.where(Alert.asset_id == asset_id)
    if allowed_assets is not None:
        q = q.where(Alert.asset_id.in_(sorted(allowed_assets)))
    if state is not None:
        q = q.where(Alert.state == state)
    if severity is not None:
        q = q.where(Alert.severity == severity)
    if condition is not None:
        q = q.where(Alert.condition == condition)
    if since is not None:
        q = q.where(Alert.last_seen_at >= since)
    if until is not None:
        q = q.where(Alert.opened_at < until)
    ranked = sort == "priority"
    rank = priority_rank()
    if cursor is not None:
        last_rank, at, last_id = decode_cursor(cursor, ranked=ranked)
        after = or_(Alert.opened_at < at, and_(Alert.opened_at == at, Alert.id < last_id))
        q = q.where(or_(rank > last_rank, and_(rank == last_rank, after)) if ranked else after)
    order = (rank, Alert.opened_at.desc(), Alert.id.desc()) if ranked else (Alert.opened_at.desc(), Alert.id.desc())
    found = session.execute(q.add_columns(rank.label("rank")).order_by(*order).limit(limit + 1)).all()
    more = len(found) > limit
    found = found[:limit]
    rows = [alert for alert, _ in found]
    next_cursor = None
    if more and found:
        last, last_rank = found[-1]
        next_cursor = encode_cursor(last.opened_at, last.id, int(last_rank) if ranked else None)
    return rows, next_cursor


def warning_levels(session: Session, alerts: Sequence[Alert]) -> dict[int, float]:
    """The warning level in force when each alert opened ({threshold version id: warning})."""
    ids = sorted({a.threshold_version_id for a in alerts if a.threshold_version_id is not None})
    if not ids:
        return {}
    return dict(session.execute(select(ThresholdVersion.id, ThresholdVersion.warning).where(ThresholdVersion.id.in_(ids))).all())


@dataclass(frozen=True)
class AlertDetail:
    alert: Alert
    threshold: ThresholdVersion | None
    events: list[AlertEvent]


def _get(session: Session, alert_id: int, *, for_update: bool = False) -> Alert:
    q = select(Alert).where(Alert.id == alert_id)
    if for_update:
        q = q.with_for_update()
    alert = session.scalars(q).first()
    if alert is None:
        raise NotFound(f"no alert with id {alert_id}", field="path.alert_id")
    return alert


def get_alert(session: Session, *, alert_id: int, allowed_assets: Collection[str] | None = None) -> AlertDetail:
    """The alert, the threshold version in force when it opened, and its history (oldest first)."""
    alert = _get(session, alert_id)
    if allowed_assets is not None and alert.asset_id not in allowed_assets:
        raise NotFound(f"no alert with id {alert_id}", field="path.alert_id")
    threshold = session.get(ThresholdVersion, alert.threshold_version_id) if alert.threshold_version_id else None
    events = list(session.scalars(select(AlertEvent).where(AlertEvent.alert_id == alert_id).order_by(AlertEvent.at, AlertEvent.id)))
    return AlertDetail(alert, threshold, events)


def _record(
    session: Session, alert: Alert, *, kind: str, actor: str, at: datetime, note: str | None, details: dict[str, Any] | None = None
) -> AlertEvent:
    event = AlertEvent(alert_id=alert.id, at=at, kind=kind, actor=actor, note=note, details=details)
    session.add(event)
    audit = {"asset_id": alert.asset_id, "state": alert.state, **(details or {})}
    if note is not None:
        audit["note"] = note
    session.add(AuditLog(at=at, actor=actor, action=f"alert.{kind}", target=f"alert:{alert.id}", details=audit))
    return event


def _conflict(alert: Alert, doing: str) -> Conflict:
    return Conflict(
        f"alert {alert.id} is {alert.state}: it cannot be {doing}",
        details={"state": alert.state, "condition": alert.condition, "outcome": alert.outcome},
    )


def acknowledge(session: Session, *, alert_id: int, actor: str, note: str | None = None, now: datetime | None = None) -> Alert:
    """unacknowledged -> acknowledged; Conflict (with the current state) otherwise."""
    now = now or datetime.now(timezone.utc)
    alert = _get(session, alert_id, for_update=True)
    if alert.state != "unacknowledged":
        raise _conflict(alert, "acknowledged")
    alert.state = "acknowledged"
    alert.acknowledged_at, alert.acknowledged_by = now, actor
    _record(session, alert, kind="acknowledged", actor=actor, at=now, note=note)
    session.flush()
    return alert


def close(
    session: Session, *, alert_id: int, actor: str, outcome: str, note: str | None = None, now: datetime | None = None
) -> Alert:
    """Close with an outcome (acknowledging first if needed); Conflict if already closed."""
    if outcome not in OUTCOMES:
        raise BadInput(f"outcome must be one of {', '.join(OUTCOMES)}, got {outcome!r}", field="body.outcome")
    now = now or datetime.now(timezone.utc)
    alert = _get(session, alert_id, for_update=True)
    if alert.state == "closed":
        raise _conflict(alert, "closed again")
    if alert.state == "unacknowledged":
        alert.state = "acknowledged"
        alert.acknowledged_at, alert.acknowledged_by = now, actor
        _record(session, alert, kind="acknowledged", actor=actor, at=now, note=None, details={"implicit": True, "by": "close"})
    still_active = alert.condition == "active"
    alert.state = "closed"
    alert.closed_at, alert.closed_by = now, actor
    alert.outcome, alert.close_note = outcome, note
    alert.active_key = None  # the rule may open a new alert for this asset from now on
    _record(session, alert, kind="closed", actor=actor, at=now, note=note, details={"outcome": outcome, "condition_active": still_active})
    session.flush()
    return alert


def add_note(session: Session, *, alert_id: int, actor: str, note: str, now: datetime | None = None) -> AlertEvent:
    if not note.strip():
        raise BadInput("note must not be blank", field="body.note")
    now = now or datetime.now(timezone.utc)
    alert = _get(session, alert_id)
    event = _record(session, alert, kind="note", actor=actor, at=now, note=note)
    session.flush()
    return event


def count_by_state(session: Session, *, allowed_assets: Collection[str] | None = None) -> dict[str, int]:
    """How many alerts are in each state (for list headers)."""
    q = select(Alert.state, func.count()).group_by(Alert.state)
    if allowed_assets is not None:
        q = q.where(Alert.asset_id.in_(sorted(allowed_assets)))
    counts = {s: 0 for s in ALERT_STATES}
    counts.update({state: int(n) for state, n in session.execute(q)})
    return counts


# --------------------------------------------------------------------------- alert health


def health_records(session: Session, *, since: datetime, until: datetime) -> list[AlertRecord]:
    """Alerts that can matter for [since, until): opened, returned or closed inside it, or
    still standing at its end (for the stale count)."""
    q = select(Alert).where(
        Alert.opened_at < until,
        or_(
            Alert.opened_at >= since,
            Alert.returned_at.is_(None),
            Alert.returned_at >= since,
            Alert.closed_at.is_(None),
            Alert.closed_at >= since,
        ),
    )
    return [
        AlertRecord(
            alert_id=a.id,
            asset_id=a.asset_id,
            opened_ms=to_ms(a.opened_at),
            returned_ms=to_ms(a.returned_at) if a.returned_at else None,
            closed_ms=to_ms(a.closed_at) if a.closed_at else None,
            outcome=a.outcome,
        )
        for a in session.scalars(q.order_by(Alert.opened_at, Alert.id))
    ]


def asset_spans(session: Session, *, until: datetime) -> list[AssetSpan]:
    """Assets and when each was first watched: the earliest of its first stored window, its
    first alert and its creation (replayed history predates the row's creation time)."""
    first_window = dict(
        session.execute(select(WindowScore.asset_id, func.min(WindowScore.window_end_ms)).group_by(WindowScore.asset_id)).all()
    )
    first_alert = dict(session.execute(select(Alert.asset_id, func.min(Alert.opened_at)).group_by(Alert.asset_id)).all())
    out = []
    for asset in session.scalars(select(Asset).order_by(Asset.asset_id)):
        since = to_ms(asset.created_at)
        if first_window.get(asset.asset_id) is not None:
            since = min(since, int(first_window[asset.asset_id]))
        if first_alert.get(asset.asset_id) is not None:
            since = min(since, to_ms(_aware(first_alert[asset.asset_id])))
        if since < to_ms(until):
            out.append(AssetSpan(asset.asset_id, since))
    return out


def _aware(t: datetime) -> datetime:
    # func.min() bypasses the column type on SQLite, so the UTC zone is re-attached here.
    if isinstance(t, str):
        t = datetime.fromisoformat(t)
    return t if t.tzinfo is not None else t.replace(tzinfo=timezone.utc)


def just_after(ms: int) -> datetime:
    """The first whole minute strictly after `ms`: a readable exclusive end for a default range."""
    return from_ms((ms // 60_000 + 1) * 60_000)


def newest_window_end(session: Session) -> datetime | None:
    """The fleet's newest window end the rule has seen (None before any)."""
    ms = session.scalar(select(func.max(Asset.last_window_end_ms)))
    return from_ms(int(ms)) if ms is not None else None
