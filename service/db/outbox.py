"""The notification outbox: messages written in the same transaction as the alert
transition that causes them, then claimed and delivered by the background sender
(service/notifier.py), and the routing rules that decide who gets which.

Guarantees, and where each comes from:
- Nothing lost: the outbox row commits or rolls back with the transition itself
  (`enqueue_transition` runs on the transition's connection).
- Each transition queued once per route: `idempotency_key` (alert, transition, route) is
  UNIQUE, so a transition written twice fails in the database, not in a process's memory.
- Never sent by two senders at once: a sender claims one row with a conditional UPDATE
  (pending and due, or a lease that ran out) that only one writer can win on SQLite and
  PostgreSQL alike, and holds it for `lease_s`. A sender that dies mid-delivery leaves a
  lease that runs out; the row is then claimed again and sent with the same idempotency
  key, which receivers use to drop the repeat (at-least-once delivery with a key).
- Retries: a failed delivery goes back to pending with exponential backoff
  (`backoff_delay`); after `max_attempts`, or on an answer that retrying cannot change
  (a 4xx other than 408/429), it is dead-lettered (status "dead") and kept for admins.

Alerts opened by a backfill (`AlertRow.backfilled`, tests/http/test_backfill.py) send nothing: they tell
of the past, not of something to go and look at now.
"""

from __future__ import annotations

import secrets
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from typing import Any

from sqlalchemy import Connection, and_, exists, insert, or_, select, update
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session, aliased

from service.db.models import NOTIFY_CHANNELS, NOTIFY_EVENTS, SEVERITIES, Alert, AuditLog, NotifyOutbox, NotifyRoute
from service.errors import BadInput, Conflict, NotFound

SEVERITY_RANK = {name: i for i, name in enumerate(SEVERITIES)}  # warning 0, critical 1
EVENT_TEXT = {
    "opened": "opened",
    "escalated": "escalated to critical",
    "returned": "returned to normal",
    "unacknowledged": "still unacknowledged",
    "test": "test message",
}
_OUTBOX = NotifyOutbox.__table__
_ROUTES = NotifyRoute.__table__


def _now() -> datetime:
    return datetime.now(timezone.utc)


def _iso(t: datetime) -> str:
    return t.astimezone(timezone.utc).isoformat().replace("+00:00", "Z")


def route_matches(route: Any, *, asset_id: str, severity: str, kind: str) -> bool:
    """Does a route want this transition? (asset: its own or any; severity: at or above its
    minimum; the event among its events.)"""
    if not route.enabled or kind not in (route.events or []):
        return False
    if route.asset_id is not None and route.asset_id != asset_id:
        return False
    return SEVERITY_RANK.get(severity, 0) >= SEVERITY_RANK.get(route.min_severity, 0)


def message_key(alert_id: int, kind: str, route_id: int) -> str:
    return f"alert-{alert_id}-{kind}-route-{route_id}"


def payload_for(kind: str, *, alert_id: int, asset_id: str, severity: str, at: datetime, peak_score: float | None,
                top_channels: Sequence[dict[str, Any]] | None, key: str) -> dict[str, Any]:
    """The message body every channel renders: what happened, to which alert, when."""
    top = [str(c.get("channel")) for c in (top_channels or [])][:3]
    text = f"kilter: {severity} alert #{alert_id} on {asset_id} {EVENT_TEXT.get(kind, kind)} at {_iso(at)}"
    return {
        "event": kind,
        "idempotency_key": key,
        "alert": {
            "id": alert_id,
            "asset_id": asset_id,
            "severity": severity,
            "at": _iso(at),
            "peak_score": peak_score,
            "top_channels": top,
            "path": f"/alerts/{alert_id}",
        },
        "text": text,
        "caution": "Advisory only: follow the site's isolation and lock-out procedures before working on the machine.",
    }


def enqueue_transition(conn: Connection, kind: str, alert: Any, *, at: datetime, asset_id: str | None = None) -> int:
    """Queue one message per matching route for an alert transition, on the transition's own
    connection (so both commit together). `alert` is the rule's AlertRow; returns how many."""
    if alert.backfilled:
        return 0
    if asset_id is None:
        asset_id = conn.execute(select(Alert.asset_id).where(Alert.id == alert.id)).scalar_one()
    routes = conn.execute(select(_ROUTES).where(_ROUTES.c.enabled == 1)).all()
    wanted = [r for r in routes if route_matches(r, asset_id=asset_id, severity=alert.severity, kind=kind)]
    if not wanted:
        return 0
    now = _now()
    rows = []
    for r in wanted:
        key = message_key(alert.id, kind, r.id)
        body = payload_for(kind, alert_id=alert.id, asset_id=asset_id, severity=alert.severity, at=at,
                           peak_score=float(alert.peak_score), top_channels=alert.top_channels, key=key)
        rows.append({"idempotency_key": key, "route_id": r.id, "alert_id": alert.id, "kind": kind, "payload": body,
                     "status": "pending", "attempts": 0, "next_attempt_at": now, "lease_until": None, "lease_owner": None,
                     "last_error": None, "created_at": now, "sent_at": None})
    conn.execute(insert(_OUTBOX), rows)
    return len(rows)


def queue_reminders(session: Session, *, older_than: timedelta, now: datetime | None = None) -> int:
    """"Still unacknowledged" messages: for every opened message queued more than
    `older_than` ago (wall clock, so replayed history does not trigger them at once) whose
    alert is still unacknowledged and whose route wants reminders, one reminder per route.
    Several replicas may run this together: the UNIQUE key lets one insert win; a loser
    rolls back its savepoint and moves on."""
    now = now or _now()
    added = 0
    for alert_id, route_id, asset_id, severity, _opened_at, peak, tops in session.execute(_reminders_due(now, older_than)).all():
        route = session.get(NotifyRoute, route_id)
        if route is None or "unacknowledged" not in (route.events or []):
            continue
        key = message_key(alert_id, "unacknowledged", route_id)
        body = payload_for("unacknowledged", alert_id=alert_id, asset_id=asset_id, severity=severity, at=now,
                           peak_score=float(peak), top_channels=tops, key=key)
        try:
            with session.begin_nested():
                session.add(NotifyOutbox(idempotency_key=key, route_id=route_id, alert_id=alert_id, kind="unacknowledged",
                                         payload=body, status="pending", attempts=0, next_attempt_at=now, created_at=now))
            added += 1
        except IntegrityError:
            continue  # another sender queued it first
    return added


def _reminders_due(now: datetime, older_than: timedelta) -> Any:
    opened = aliased(NotifyOutbox)
    reminder = aliased(NotifyOutbox)
    return (
        select(opened.alert_id, opened.route_id, Alert.asset_id, Alert.severity, Alert.opened_at, Alert.peak_score, Alert.top_channels)
        .join(Alert, Alert.id == opened.alert_id)
        .join(NotifyRoute, NotifyRoute.id == opened.route_id)
        .where(
            opened.kind == "opened",
            opened.created_at <= now - older_than,
            Alert.state == "unacknowledged",
            NotifyRoute.enabled == 1,
            ~exists().where(and_(reminder.alert_id == opened.alert_id, reminder.route_id == opened.route_id,
                                 reminder.kind == "unacknowledged")),
        )
        .order_by(opened.id)
        .limit(200)
    )


def work_waiting(session: Session, *, reminders_after: timedelta | None, now: datetime | None = None) -> tuple[bool, bool]:
    """(reminders due, messages due): a read-only look, so an idle sender never takes the
    write lock."""
    now = now or _now()
    reminders = reminders_after is not None and session.execute(_reminders_due(now, reminders_after).limit(1)).first() is not None
    messages = session.execute(select(NotifyOutbox.id).where(_due(now)).limit(1)).first() is not None
    return reminders, messages


def _due(now: datetime) -> Any:
    return or_(
        and_(NotifyOutbox.status == "pending", NotifyOutbox.next_attempt_at <= now),
        and_(NotifyOutbox.status == "sending", NotifyOutbox.lease_until < now),
    )


# --------------------------------------------------------------------------- delivery


@dataclass(frozen=True)
class Claimed:
    """A message a sender holds under its lease, with what it needs to deliver it."""

    id: int
    idempotency_key: str
    kind: str
    payload: dict[str, Any]
    attempts: int  # including this one
    route_id: int
    route_name: str
    channel: str
    target: str
    secret: str | None


def claim_one(session: Session, *, owner: str, lease_s: float, now: datetime | None = None) -> Claimed | None:
    """Take the oldest due message (pending and due, or sending with a lease that ran out)
    of an enabled route under a lease for `owner`; None when nothing is due. The UPDATE's
    condition is checked again by the database, so two senders never both win a row."""
    now = now or _now()
    due = _due(now)
    candidates = session.execute(
        select(NotifyOutbox.id)
        .join(NotifyRoute, NotifyRoute.id == NotifyOutbox.route_id)
        .where(due, NotifyRoute.enabled == 1)
        .order_by(NotifyOutbox.next_attempt_at, NotifyOutbox.id)
        .limit(5)
    ).scalars().all()
    for row_id in candidates:
        won = session.execute(
            update(NotifyOutbox)
            .where(NotifyOutbox.id == row_id, due)
            .values(status="sending", lease_owner=owner, lease_until=now + timedelta(seconds=lease_s),
                    attempts=NotifyOutbox.attempts + 1)
            .execution_options(synchronize_session=False)
        ).rowcount
        if won == 1:
            row = session.get(NotifyOutbox, row_id, populate_existing=True)
            route = session.get(NotifyRoute, row.route_id)
            assert row is not None and route is not None
            return Claimed(row.id, row.idempotency_key, row.kind, dict(row.payload), int(row.attempts), route.id, route.name,
                           route.channel, route.target, route.secret)
    return None


def backoff_delay(attempts: int, *, base_s: float, max_s: float) -> float:
    """Seconds before the next try after `attempts` failed ones: base, 2x base, 4x base, ...
    up to max_s (exponential backoff, common practice)."""
    return float(min(max_s, base_s * 2 ** max(0, attempts - 1)))


def mark_sent(session: Session, *, row_id: int, owner: str, now: datetime | None = None) -> bool:
    """Delivered. False if the lease had been lost to another sender (that one sends it again,
    with the same key)."""
    now = now or _now()
    return session.execute(
        update(NotifyOutbox)
        .where(NotifyOutbox.id == row_id, NotifyOutbox.status == "sending", NotifyOutbox.lease_owner == owner)
        .values(status="sent", sent_at=now, lease_until=None, last_error=None)
        .execution_options(synchronize_session=False)
    ).rowcount == 1


def mark_failed(session: Session, *, row_id: int, owner: str, error: str, attempts: int, permanent: bool, max_attempts: int,
                base_s: float, max_s: float, now: datetime | None = None) -> str:
    """A failed try: back to pending after the backoff, or dead when retrying cannot help or
    the attempts are used up. Returns the new status ("" if the lease had been lost)."""
    now = now or _now()
    dead = permanent or attempts >= max_attempts
    values: dict[str, Any] = {"lease_until": None, "last_error": error[:2000]}
    if dead:
        values["status"] = "dead"
    else:
        values["status"] = "pending"
        values["next_attempt_at"] = now + timedelta(seconds=backoff_delay(attempts, base_s=base_s, max_s=max_s))
    won = session.execute(
        update(NotifyOutbox)
        .where(NotifyOutbox.id == row_id, NotifyOutbox.status == "sending", NotifyOutbox.lease_owner == owner)
        .values(**values)
        .execution_options(synchronize_session=False)
    ).rowcount
    return str(values["status"]) if won == 1 else ""


# --------------------------------------------------------------------------- routes (admins)


def _check_route_fields(channel: str, target: str, min_severity: str, events: Sequence[str]) -> None:
    if channel not in NOTIFY_CHANNELS:
        raise BadInput(f"channel must be one of {', '.join(NOTIFY_CHANNELS)}, got {channel!r}", field="body.channel")
    if min_severity not in SEVERITIES:
        raise BadInput(f"min_severity must be one of {', '.join(SEVERITIES)}, got {min_severity!r}", field="body.min_severity")
    bad = [e for e in events if e not in NOTIFY_EVENTS]
    if bad or not events:
        raise BadInput(f"events must be a non-empty subset of {', '.join(NOTIFY_EVENTS)}; got {', '.join(map(repr, events)) or 'none'}",
                       field="body.events")
    if channel == "webhook":
        if not (target.startswith("http://") or target.startswith("https://")) or len(target) < 10:
            raise BadInput(f"a webhook target is an http:// or https:// URL, got {target!r}", field="body.target")
    else:
        addresses = [a.strip() for a in target.split(",") if a.strip()]
        wrong = [a for a in addresses if "@" not in a or " " in a]
        if not addresses or wrong:
            raise BadInput(f"an e-mail target is comma-separated addresses such as ops@example.org; not an address: "
                           f"{', '.join(wrong) or repr(target)}", field="body.target")


def add_route(session: Session, *, name: str, channel: str, target: str, actor: str, asset_id: str | None = None,
              min_severity: str = "warning", events: Sequence[str] = ("opened", "escalated", "returned", "unacknowledged"),
              secret: str | None = None) -> tuple[NotifyRoute, str | None]:
    """A new route; for a webhook, its signing secret (given, or made here) is returned once."""
    name = name.strip()
    if not 1 <= len(name) <= 64:
        raise BadInput("name must be 1..64 characters", field="body.name")
    target = target.strip()
    _check_route_fields(channel, target, min_severity, list(events))
    if session.scalar(select(NotifyRoute.id).where(NotifyRoute.name == name)) is not None:
        raise Conflict(f"a route named {name!r} exists already: pick another name or remove that one first")
    if channel == "webhook":
        secret = secret or secrets.token_urlsafe(32)
        if len(secret) < 16:
            raise BadInput("a webhook secret needs at least 16 characters", field="body.secret")
    else:
        secret = None
    route = NotifyRoute(name=name, channel=channel, target=target, asset_id=asset_id or None, min_severity=min_severity,
                        events=list(dict.fromkeys(events)), secret=secret, enabled=1, created_by=actor, created_at=_now())
    session.add(route)
    session.flush()
    session.add(AuditLog(at=_now(), actor=actor, action="notify.route_added", target=f"notify_route:{route.id}",
                         details={"name": name, "channel": channel, "target": target, "asset_id": asset_id,
                                  "min_severity": min_severity, "events": list(events)}))
    session.flush()
    return route, secret


def list_routes(session: Session) -> list[NotifyRoute]:
    return list(session.scalars(select(NotifyRoute).order_by(NotifyRoute.id)))


def get_route(session: Session, *, route_id: int) -> NotifyRoute:
    route = session.get(NotifyRoute, route_id)
    if route is None:
        raise NotFound(f"no notification route with id {route_id}", field="path.route_id")
    return route


def set_enabled(session: Session, *, route_id: int, enabled: bool, actor: str) -> NotifyRoute:
    """Turn a route off (no new messages; its queued ones wait) or on again. Routes are kept,
    not deleted, so the outbox keeps its history."""
    route = get_route(session, route_id=route_id)
    route.enabled = 1 if enabled else 0
    session.add(AuditLog(at=_now(), actor=actor, action="notify.route_enabled" if enabled else "notify.route_disabled",
                         target=f"notify_route:{route.id}", details={"name": route.name}))
    session.flush()
    return route


def queue_test(session: Session, *, route_id: int, actor: str) -> NotifyOutbox:
    """A test message through one route, delivered by the sender like any other."""
    route = get_route(session, route_id=route_id)
    if not route.enabled:
        raise Conflict(f"route {route.name!r} is turned off: turn it on before sending a test")
    now = _now()
    key = f"test-{route.id}-{secrets.token_hex(8)}"
    body = {
        "event": "test",
        "idempotency_key": key,
        "alert": None,
        "text": f"kilter: test message for route {route.name!r}, sent by {actor} at {_iso(now)}",
        "caution": "Advisory only: follow the site's isolation and lock-out procedures before working on the machine.",
    }
    row = NotifyOutbox(idempotency_key=key, route_id=route.id, alert_id=None, kind="test", payload=body, status="pending",
                       attempts=0, next_attempt_at=now, created_at=now)
    session.add(row)
    session.add(AuditLog(at=now, actor=actor, action="notify.test", target=f"notify_route:{route.id}", details={"key": key}))
    session.flush()
    return row


def list_outbox(session: Session, *, status: str | None = None, limit: int = 50) -> list[NotifyOutbox]:
    q = select(NotifyOutbox)
    if status is not None:
        q = q.where(NotifyOutbox.status == status)
    return list(session.scalars(q.order_by(NotifyOutbox.id.desc()).limit(limit)))


def retry_dead(session: Session, *, row_id: int, actor: str) -> NotifyOutbox:
    """Put a dead-lettered message back in the queue (attempts start again)."""
    row = session.get(NotifyOutbox, row_id)
    if row is None:
        raise NotFound(f"no outbox message with id {row_id}", field="path.message_id")
    if row.status != "dead":
        raise Conflict(f"message {row_id} is {row.status}: only dead messages are retried by hand", details={"status": row.status})
    row.status, row.attempts, row.next_attempt_at, row.last_error = "pending", 0, _now(), None
    session.add(AuditLog(at=_now(), actor=actor, action="notify.retry", target=f"notify_outbox:{row_id}", details={"key": row.idempotency_key}))
    session.flush()
    return row
