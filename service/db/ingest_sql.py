"""The ingest request's statements, compiled once per engine (service/db/prepared.py says
why), with the plain rows they return. The rarer steps of ingest (a new asset, a new
threshold version, gap windows) stay on the ORM and Core queries of service/db/readings.py
and service/db/thresholds.py, in the same transaction.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from functools import cached_property
from typing import Any

from sqlalchemy import Connection, Engine, Integer, bindparam, insert, select, update
from sqlalchemy.engine import Dialect

from service.db.models import Alert, AlertEvent, Asset, Reading, ThresholdVersion, WindowScore
from service.db.prepared import Prepared


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
    dirty: bool = False


_ASSET_COLS = ("asset_id", "model_id", "last_reading_at", "last_window_end_ms", "last_score", "ingest_seq", "shelved_until", "rule_override")
_THRESHOLD_COLS = ("id", "version", "warning", "critical", "on_k", "on_n", "off_m", "deadband_frac", "model_id", "model_version")
_ALERT_COLS = ("id", "severity", "last_seen_at", "peak_score", "peak_at", "top_channels", "condition", "returned_at", "active_key")


def _all_columns(table: Any) -> dict[str, Any]:
    """Every non-key column as a bindparam of its own name: callers give each value, so no
    Python-side column default is silently skipped by the compiled statement."""
    return {c.name: bindparam(c.name, type_=c.type) for c in table.columns if not c.primary_key}


class IngestSQL:
    """The compiled statements for one engine's dialect."""

    def __init__(self, dialect: Dialect) -> None:
        self.dialect = dialect

    @classmethod
    def for_engine(cls, engine: Engine) -> IngestSQL:
        found = engine.__dict__.get("_echowatch_ingest_sql")
        if found is None:
            found = cls(engine.dialect)
            engine.__dict__["_echowatch_ingest_sql"] = found
        return found

    # --- statements (compiled on first use) ---------------------------------------------

    @cached_property
    def _asset_row(self) -> Prepared:
        t = Asset.__table__
        return Prepared(select(*(t.c[c] for c in _ASSET_COLS)).where(t.c.asset_id == bindparam("asset_id")), self.dialect)

    @cached_property
    def _asset_for_update(self) -> Prepared:
        t = Asset.__table__
        stmt = select(*(t.c[c] for c in _ASSET_COLS)).where(t.c.asset_id == bindparam("asset_id")).with_for_update()
        return Prepared(stmt, self.dialect)

    @cached_property
    def _threshold_in_force(self) -> Prepared:
        t = ThresholdVersion.__table__
        stmt = (
            select(*(t.c[c] for c in _THRESHOLD_COLS))
            .where(t.c.asset_id == bindparam("asset_id"))
            .order_by(t.c.version.desc())
            .limit(1)
        )
        return Prepared(stmt, self.dialect)

    @cached_property
    def _readings_between(self) -> Prepared:
        t = Reading.__table__
        stmt = (
            select(t.c.ts_ms, t.c["values"])
            .where(t.c.asset_id == bindparam("asset_id"), t.c.ts_ms >= bindparam("lo_ms"), t.c.ts_ms <= bindparam("hi_ms"))
            .order_by(t.c.ts_ms)
        )
        return Prepared(stmt, self.dialect)

    @cached_property
    def _insert_reading(self) -> Prepared:
        t = Reading.__table__
        return Prepared(insert(t).values(_all_columns(t)), self.dialect)

    @cached_property
    def _scored_between(self) -> Prepared:
        t = WindowScore.__table__
        stmt = select(t.c.window_end_index).where(
            t.c.asset_id == bindparam("asset_id"),
            t.c.model_id == bindparam("model_id"),
            t.c.model_version == bindparam("model_version"),
            t.c.window_end_index >= bindparam("lo"),
            t.c.window_end_index <= bindparam("hi"),
        )
        return Prepared(stmt, self.dialect)

    @cached_property
    def _insert_score(self) -> Prepared:
        t = WindowScore.__table__
        return Prepared(insert(t).values(_all_columns(t)), self.dialect)

    @cached_property
    def _recent_scores(self) -> Prepared:
        t = WindowScore.__table__
        stmt = (
            select(t.c.score)
            .where(
                t.c.asset_id == bindparam("asset_id"),
                t.c.model_id == bindparam("model_id"),
                t.c.model_version == bindparam("model_version"),
                t.c.window_end_index < bindparam("before_index"),
            )
            .order_by(t.c.window_end_index.desc())
            .limit(bindparam("limit", type_=Integer))
        )
        return Prepared(stmt, self.dialect)

    @cached_property
    def _active_alert(self) -> Prepared:
        t = Alert.__table__
        return Prepared(select(*(t.c[c] for c in _ALERT_COLS)).where(t.c.active_key == bindparam("asset_id")), self.dialect)

    @cached_property
    def _insert_alert(self) -> Prepared:
        t = Alert.__table__
        return Prepared(insert(t).values(_all_columns(t)).returning(t.c.id), self.dialect)

    @cached_property
    def _update_alert(self) -> Prepared:
        t = Alert.__table__
        stmt = update(t).where(t.c.id == bindparam("alert_id")).values({c: bindparam(c, type_=t.c[c].type) for c in _ALERT_COLS[1:]})
        return Prepared(stmt, self.dialect)

    @cached_property
    def _insert_event(self) -> Prepared:
        t = AlertEvent.__table__
        return Prepared(insert(t).values(_all_columns(t)), self.dialect)

    @cached_property
    def _update_asset(self) -> Prepared:
        t = Asset.__table__
        stmt = (
            update(t)
            .where(t.c.asset_id == bindparam("asset_id"))
            .values(
                last_reading_at=bindparam("last_reading_at", type_=t.c.last_reading_at.type),
                last_window_end_ms=bindparam("last_window_end_ms", type_=t.c.last_window_end_ms.type),
                last_score=bindparam("last_score", type_=t.c.last_score.type),
                ingest_seq=bindparam("ingest_seq", type_=t.c.ingest_seq.type),
            )
        )
        return Prepared(stmt, self.dialect)

    # --- operations ----------------------------------------------------------------------

    def asset_row(self, conn: Connection, asset_id: str) -> AssetRow | None:
        """The asset row as this connection sees it, without a lock."""
        rows = self._asset_row.rows(conn, {"asset_id": asset_id})
        return AssetRow(*rows[0]) if rows else None

    def asset_for_update(self, conn: Connection, asset_id: str) -> AssetRow | None:
        """The asset row, locked for the transaction on engines with row locks (PostgreSQL);
        SQLite's write transaction (BEGIN IMMEDIATE) already excludes other writers."""
        rows = self._asset_for_update.rows(conn, {"asset_id": asset_id})
        return AssetRow(*rows[0]) if rows else None

    def threshold_in_force(self, conn: Connection, asset_id: str) -> ThresholdRow | None:
        rows = self._threshold_in_force.rows(conn, {"asset_id": asset_id})
        return ThresholdRow(*rows[0]) if rows else None

    def readings_between(self, conn: Connection, asset_id: str, lo_ms: int, hi_ms: int) -> list[tuple[int, dict[str, Any]]]:
        """(ts_ms, values) with lo_ms <= ts_ms <= hi_ms, oldest first."""
        return [(int(t), v) for t, v in self._readings_between.rows(conn, {"asset_id": asset_id, "lo_ms": lo_ms, "hi_ms": hi_ms})]

    def insert_readings(self, conn: Connection, asset_id: str, rows: list[tuple[int, dict[str, Any]]], received_at: datetime) -> None:
        self._insert_reading.executemany(
            conn, ({"asset_id": asset_id, "ts_ms": t, "values": v, "received_at": received_at} for t, v in rows)
        )

    def scored_between(self, conn: Connection, *, asset_id: str, model_id: str, model_version: str, lo: int, hi: int) -> set[int]:
        params = {"asset_id": asset_id, "model_id": model_id, "model_version": model_version, "lo": lo, "hi": hi}
        return {int(r[0]) for r in self._scored_between.rows(conn, params)}

    def insert_scores(self, conn: Connection, rows: list[dict[str, Any]]) -> None:
        self._insert_score.executemany(conn, rows)

    def recent_scores(self, conn: Connection, *, asset_id: str, model_id: str, model_version: str, before_index: int, limit: int) -> list[float]:
        """The last `limit` stored scores before window end `before_index`, oldest first."""
        params = {"asset_id": asset_id, "model_id": model_id, "model_version": model_version, "before_index": before_index, "limit": limit}
        return [float(r[0]) for r in reversed(self._recent_scores.rows(conn, params))]

    def active_alert(self, conn: Connection, asset_id: str) -> AlertRow | None:
        rows = self._active_alert.rows(conn, {"asset_id": asset_id})
        return AlertRow(*rows[0]) if rows else None

    def insert_alert(self, conn: Connection, values: dict[str, Any]) -> int:
        return int(self._insert_alert.rows(conn, values)[0][0])

    def save_alert(self, conn: Connection, alert: AlertRow) -> None:
        self._update_alert.execute(conn, {"alert_id": alert.id, **{c: getattr(alert, c) for c in _ALERT_COLS[1:]}})
        alert.dirty = False

    def insert_event(self, conn: Connection, *, alert_id: int, at: datetime, kind: str, actor: str, details: dict[str, Any] | None) -> None:
        self._insert_event.execute(conn, {"alert_id": alert_id, "at": at, "kind": kind, "actor": actor, "note": None, "details": details})

    def update_asset(
        self, conn: Connection, *, asset_id: str, last_reading_at: datetime | None, last_window_end_ms: int | None,
        last_score: float | None, ingest_seq: int,
    ) -> None:
        self._update_asset.execute(conn, {
            "asset_id": asset_id, "last_reading_at": last_reading_at, "last_window_end_ms": last_window_end_ms,
            "last_score": last_score, "ingest_seq": ingest_seq,
        })
