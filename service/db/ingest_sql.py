"""The ingest request's statements, each compiled once per dialect and run on the DBAPI
cursor (service/db/prepared.py says why), with the plain rows they return. The rarer steps
of ingest (a new asset, a new threshold version, gap windows, a sparse duplicate check) stay
on the ORM and Core queries of service/db/readings.py and service/db/thresholds.py, in the
same transaction.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable
from dataclasses import dataclass, fields
from datetime import datetime
from typing import Any

from sqlalchemy import Connection, Integer, bindparam, insert, select, update
from sqlalchemy.sql import ClauseElement

from service.db.models import Alert, AlertEvent, Asset, Reading, ThresholdVersion, WindowScore
from service.db.prepared import Prepared, prepared


@dataclass(frozen=True)
class AssetRow:
    asset_id: str
    model_id: str
    last_reading_at: datetime | None
    last_window_end_ms: int | None
    last_score: float | None
    ingest_seq: int
    shelved_until: datetime | None
    rule_override: dict[str, Any] | None


@dataclass(frozen=True)
class ThresholdRow:
    """The columns of a threshold version the rule needs (same names as ThresholdVersion)."""

    id: int
    version: int
    warning: float
    critical: float
    on_k: int
    on_n: int
    off_m: int
    deadband_frac: float
    model_id: str
    model_version: str


@dataclass
class AlertRow:
    """The asset's active alert as the rule changes it; `dirty` once a column moved."""

    id: int
    severity: str
    last_seen_at: datetime
    peak_score: float
    peak_at: datetime
    top_channels: list[Any]
    condition: str = "active"
    returned_at: datetime | None = None
    active_key: str | None = None
    backfilled: bool = False  # opened by a backfill of history: sends no notification
    dirty: bool = False


# The columns each row class reads: its field names (AlertRow's bookkeeping flag aside).
_ASSET_COLS = tuple(f.name for f in fields(AssetRow))
_THRESHOLD_COLS = tuple(f.name for f in fields(ThresholdRow))
_ALERT_COLS = tuple(f.name for f in fields(AlertRow) if f.name != "dirty")
# The columns the rule owns while an alert is active (extend, escalate); a return also
# clears the active slot. state, outcome, acknowledgement and closing are people's.
_RULE_COLS = ("severity", "last_seen_at", "peak_score", "peak_at", "top_channels")
_RETURN_COLS = ("condition", "returned_at")


def _all_columns(table: Any) -> dict[str, Any]:
    """Every non-key column as a bindparam of its own name: callers give each value, so no
    Python-side column default is silently skipped by the compiled statement."""
    return {c.name: bindparam(c.name, type_=c.type) for c in table.columns if not c.primary_key}


def _bound(table: Any, names: Iterable[str]) -> dict[str, Any]:
    """The named columns as bindparams of their own names, typed by the column."""
    return {n: bindparam(n, type_=table.c[n].type) for n in names}


def _stmt(conn: Connection, build: Callable[[], ClauseElement]) -> Prepared:
    return prepared(conn.dialect, f"ingest.{build.__name__}", build)


# --- statements ------------------------------------------------------------------------


def _asset_select() -> Any:
    t = Asset.__table__
    return select(*(t.c[c] for c in _ASSET_COLS)).where(t.c.asset_id == bindparam("asset_id"))


def _asset_locked() -> Any:
    return _asset_select().with_for_update()


def _threshold_in_force() -> Any:
    from service.db.thresholds import in_force_select  # the one query for the version in force

    t = ThresholdVersion.__table__
    return in_force_select(*(t.c[c] for c in _THRESHOLD_COLS))


def _readings_between() -> Any:
    t = Reading.__table__
    return (
        select(t.c.ts_ms, t.c["values"])
        .where(t.c.asset_id == bindparam("asset_id"), t.c.ts_ms >= bindparam("lo_ms"), t.c.ts_ms <= bindparam("hi_ms"))
        .order_by(t.c.ts_ms)
    )


def _window_key(t: Any) -> list[Any]:
    return [t.c.asset_id == bindparam("asset_id"), t.c.model_id == bindparam("model_id"), t.c.model_version == bindparam("model_version")]


def _scored_between() -> Any:
    t = WindowScore.__table__
    return select(t.c.window_end_index).where(*_window_key(t), t.c.window_end_index >= bindparam("lo"), t.c.window_end_index <= bindparam("hi"))


def _recent_scores() -> Any:
    t = WindowScore.__table__
    return (
        select(t.c.score)
        .where(*_window_key(t), t.c.window_end_index < bindparam("before_index"), t.c.rule_saw.is_(True))
        .order_by(t.c.window_end_index.desc())
        .limit(bindparam("limit", type_=Integer))
    )


def _active_alert() -> Any:
    # Locked for the transaction (FOR UPDATE on PostgreSQL; SQLite's write transaction
    # already excludes other writers): a person's close waits for this request, or this
    # request waits for the close and then finds no active alert (PostgreSQL re-checks the
    # WHERE clause on the row as committed).
    t = Alert.__table__
    return select(*(t.c[c] for c in _ALERT_COLS)).where(t.c.active_key == bindparam("asset_id"), t.c.state != "closed").with_for_update()


def _insert_reading() -> Any:
    return insert(Reading.__table__).values(_all_columns(Reading.__table__))


def _insert_score() -> Any:
    return insert(WindowScore.__table__).values(_all_columns(WindowScore.__table__))


def _insert_alert() -> Any:
    t = Alert.__table__
    return insert(t).values(_all_columns(t)).returning(t.c.id)


def _insert_event() -> Any:
    return insert(AlertEvent.__table__).values(_all_columns(AlertEvent.__table__))


def _update_alert() -> Any:
    t = Alert.__table__
    return update(t).where(t.c.id == bindparam("alert_id"), t.c.state != "closed").values(_bound(t, _RULE_COLS))


def _return_alert() -> Any:
    t = Alert.__table__
    return (
        update(t)
        .where(t.c.id == bindparam("alert_id"), t.c.state != "closed")
        .values(**_bound(t, _RULE_COLS + _RETURN_COLS), active_key=None)
    )


_ASSET_MARKS = ("last_reading_at", "last_window_end_ms", "last_score", "ingest_seq")


def _update_asset() -> Any:
    t = Asset.__table__
    return update(t).where(t.c.asset_id == bindparam("asset_id")).values(_bound(t, _ASSET_MARKS))


# --- operations ------------------------------------------------------------------------


def asset_row(conn: Connection, asset_id: str) -> AssetRow | None:
    """The asset row as this connection sees it, without a lock."""
    rows = _stmt(conn, _asset_select).rows(conn, {"asset_id": asset_id})
    return AssetRow(*rows[0]) if rows else None


def asset_for_update(conn: Connection, asset_id: str) -> AssetRow | None:
    """The asset row, locked for the transaction on engines with row locks (PostgreSQL);
    SQLite's write transaction (BEGIN IMMEDIATE) already excludes other writers."""
    rows = _stmt(conn, _asset_locked).rows(conn, {"asset_id": asset_id})
    return AssetRow(*rows[0]) if rows else None


def threshold_in_force(conn: Connection, asset_id: str) -> ThresholdRow | None:
    rows = _stmt(conn, _threshold_in_force).rows(conn, {"asset_id": asset_id})
    return ThresholdRow(*rows[0]) if rows else None


def readings_between(conn: Connection, asset_id: str, lo_ms: int, hi_ms: int) -> list[tuple[int, dict[str, Any]]]:
    """(ts_ms, values) with lo_ms <= ts_ms <= hi_ms, oldest first."""
    return [(int(t), v) for t, v in _stmt(conn, _readings_between).rows(conn, {"asset_id": asset_id, "lo_ms": lo_ms, "hi_ms": hi_ms})]


def insert_readings(conn: Connection, asset_id: str, rows: list[tuple[int, dict[str, Any]]], received_at: datetime) -> None:
    _stmt(conn, _insert_reading).executemany(
        conn, ({"asset_id": asset_id, "ts_ms": t, "values": v, "received_at": received_at} for t, v in rows)
    )


def scored_between(conn: Connection, *, asset_id: str, model_id: str, model_version: str, lo: int, hi: int) -> set[int]:
    params = {"asset_id": asset_id, "model_id": model_id, "model_version": model_version, "lo": lo, "hi": hi}
    return {int(r[0]) for r in _stmt(conn, _scored_between).rows(conn, params)}


def insert_scores(conn: Connection, rows: list[dict[str, Any]]) -> None:
    _stmt(conn, _insert_score).executemany(conn, rows)


def recent_scores(conn: Connection, *, asset_id: str, model_id: str, model_version: str, before_index: int, limit: int) -> list[float]:
    """The last `limit` stored scores the rule saw before window end `before_index`, oldest first."""
    params = {"asset_id": asset_id, "model_id": model_id, "model_version": model_version, "before_index": before_index, "limit": limit}
    return [float(r[0]) for r in reversed(_stmt(conn, _recent_scores).rows(conn, params))]


def active_alert(conn: Connection, asset_id: str) -> AlertRow | None:
    rows = _stmt(conn, _active_alert).rows(conn, {"asset_id": asset_id})
    return AlertRow(*rows[0]) if rows else None


def insert_alert(conn: Connection, values: dict[str, Any]) -> int:
    return int(_stmt(conn, _insert_alert).rows(conn, values)[0][0])


def save_alert(conn: Connection, alert: AlertRow) -> None:
    """Write the columns the rule owns (never state, outcome or a person's close)."""
    _stmt(conn, _update_alert).execute(conn, {"alert_id": alert.id, **{c: getattr(alert, c) for c in _RULE_COLS}})
    alert.dirty = False


def save_returned(conn: Connection, alert: AlertRow) -> None:
    """Write a return to normal: the rule's columns, the condition, and the freed active slot."""
    _stmt(conn, _return_alert).execute(conn, {"alert_id": alert.id, **{c: getattr(alert, c) for c in _RULE_COLS + _RETURN_COLS}})
    alert.dirty = False


def insert_event(conn: Connection, *, alert_id: int, at: datetime, kind: str, actor: str, details: dict[str, Any] | None) -> None:
    _stmt(conn, _insert_event).execute(conn, {"alert_id": alert_id, "at": at, "kind": kind, "actor": actor, "note": None, "details": details})


def update_asset(
    conn: Connection, *, asset_id: str, last_reading_at: datetime | None, last_window_end_ms: int | None,
    last_score: float | None, ingest_seq: int,
) -> None:
    values = {"last_reading_at": last_reading_at, "last_window_end_ms": last_window_end_ms, "last_score": last_score, "ingest_seq": ingest_seq}
    _stmt(conn, _update_asset).execute(conn, {"asset_id": asset_id, **values})
