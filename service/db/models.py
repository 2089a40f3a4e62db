"""The database schema (SQLAlchemy 2, typed). Portable SQL only: SQLite now, PostgreSQL
through the URL alone. Timestamps are timezone-aware UTC datetimes; where ordering or
uniqueness matters an integer epoch-milliseconds column sits beside them.

Changes go through an Alembic migration in service/db/migrations/versions/.
"""

from __future__ import annotations

from datetime import datetime, timezone
from typing import Any

from sqlalchemy import (
    JSON,
    BigInteger,
    Boolean,
    DateTime,
    Float,
    ForeignKey,
    Index,
    Integer,
    MetaData,
    String,
    Text,
    UniqueConstraint,
)
from sqlalchemy import false as sa_false
from sqlalchemy import true as sa_true
from sqlalchemy.engine import Dialect
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column
from sqlalchemy.types import TypeDecorator

# Names for constraints so migrations are reproducible on every engine.
NAMING = {
    "ix": "ix_%(column_0_label)s",
    "uq": "uq_%(table_name)s_%(column_0_N_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}

ROLES = ("machine", "maintenance", "operator", "admin")
SEVERITIES = ("warning", "critical")
ALERT_STATES = ("unacknowledged", "acknowledged", "closed")
CONDITIONS = ("active", "returned")
OUTCOMES = ("confirmed_fault", "false_alarm", "planned_work", "unknown")
EVENT_KINDS = ("opened", "escalated", "returned", "acknowledged", "note", "closed")
THRESHOLD_ORIGINS = ("calibrated", "manual", "budget", "rollback")

# SQLite has no 64-bit autoincrement primary key; INTEGER PRIMARY KEY is already 64-bit there.
BigId = BigInteger().with_variant(Integer(), "sqlite")


def utcnow() -> datetime:
    return datetime.now(timezone.utc)


class UtcDateTime(TypeDecorator[datetime]):
    """A timezone-aware UTC datetime on every engine (SQLite stores it naive; we re-attach UTC)."""

    impl = DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value: datetime | None, dialect: Dialect) -> datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError(f"naive datetime {value!r}: every timestamp must be timezone-aware UTC")
        value = value.astimezone(timezone.utc)
        return value.replace(tzinfo=None) if dialect.name == "sqlite" else value

    def process_result_value(self, value: datetime | None, dialect: Dialect) -> datetime | None:
        if value is None:
            return None
        return value.replace(tzinfo=timezone.utc) if value.tzinfo is None else value.astimezone(timezone.utc)


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING)
    type_annotation_map = {datetime: UtcDateTime(), dict[str, Any]: JSON(), list[Any]: JSON()}


class ApiKey(Base):
    __tablename__ = "api_keys"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(64))
    role: Mapped[str] = mapped_column(String(16))
    assets: Mapped[list[Any] | None] = mapped_column(JSON, default=None)  # None = every asset
    key_hash: Mapped[str] = mapped_column(String(64), unique=True)  # sha256 hex of the key
    prefix: Mapped[str] = mapped_column(String(16))  # first characters, for display
    created_at: Mapped[datetime] = mapped_column(default=utcnow)
    revoked_at: Mapped[datetime | None] = mapped_column(default=None)


class Asset(Base):
    __tablename__ = "assets"

    asset_id: Mapped[str] = mapped_column(String(64), primary_key=True)
    model_id: Mapped[str] = mapped_column(String(64))
    created_at: Mapped[datetime] = mapped_column(default=utcnow)
    last_reading_at: Mapped[datetime | None] = mapped_column(default=None)  # newest reading's time
    last_window_end_ms: Mapped[int | None] = mapped_column(BigInteger, default=None)  # newest window the rule saw
    last_score: Mapped[float | None] = mapped_column(Float, default=None)
    # Moved by every ingest that stores readings: the check that a plan made before the write
    # lock still holds under it (service/ingest.py).
    ingest_seq: Mapped[int] = mapped_column(BigInteger, default=0, server_default="0")
    shelved_until: Mapped[datetime | None] = mapped_column(default=None)
    shelve_reason: Mapped[str | None] = mapped_column(Text, default=None)
    shelved_by: Mapped[str | None] = mapped_column(String(64), default=None)
    rule_override: Mapped[dict[str, Any] | None] = mapped_column(JSON, default=None)  # on_k/on_n/off_m/deadband_frac


class Reading(Base):
    __tablename__ = "readings"
    __table_args__ = (
        UniqueConstraint("asset_id", "ts_ms"),
        Index("ix_readings_asset_ts", "asset_id", "ts_ms"),
    )

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    asset_id: Mapped[str] = mapped_column(String(64), ForeignKey("assets.asset_id"))
    ts_ms: Mapped[int] = mapped_column(BigInteger)  # epoch milliseconds, UTC
    values: Mapped[dict[str, Any]] = mapped_column(JSON)  # {channel: float | None}
    received_at: Mapped[datetime] = mapped_column(default=utcnow)


class WindowScore(Base):
    __tablename__ = "window_scores"
    __table_args__ = (
        UniqueConstraint("asset_id", "model_id", "model_version", "window_end_index"),
        Index("ix_window_scores_asset_end", "asset_id", "window_end_ms"),
    )

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    asset_id: Mapped[str] = mapped_column(String(64), ForeignKey("assets.asset_id"))
    model_id: Mapped[str] = mapped_column(String(64))
    model_version: Mapped[str] = mapped_column(String(64))
    window_end_index: Mapped[int] = mapped_column(BigInteger)  # grid index (epoch s / period)
    window_end_ms: Mapped[int] = mapped_column(BigInteger)
    score: Mapped[float] = mapped_column(Float)
    contributions: Mapped[dict[str, Any]] = mapped_column(JSON)  # {channel: share}, shares sum to 1
    threshold_version_id: Mapped[int | None] = mapped_column(ForeignKey("threshold_versions.id"), default=None)
    created_at: Mapped[datetime] = mapped_column(default=utcnow)
    # Streaming core (service/stream.py): False for a late window filling a hole behind the
    # rule's last window; the rule's state is rebuilt only from windows it saw.
    rule_saw: Mapped[bool] = mapped_column(Boolean, default=True, server_default=sa_true())


class SkippedWindow(Base):
    """A window that held readings but spanned a gap longer than the fill policy allows."""

    __tablename__ = "skipped_windows"
    __table_args__ = (
        UniqueConstraint("asset_id", "model_id", "model_version", "window_end_index"),
        Index("ix_skipped_windows_asset_end", "asset_id", "window_end_ms"),
    )

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    asset_id: Mapped[str] = mapped_column(String(64), ForeignKey("assets.asset_id"))
    model_id: Mapped[str] = mapped_column(String(64))
    model_version: Mapped[str] = mapped_column(String(64))
    window_end_index: Mapped[int] = mapped_column(BigInteger)
    window_end_ms: Mapped[int] = mapped_column(BigInteger)
    reason: Mapped[str] = mapped_column(String(16), default="gap")
    created_at: Mapped[datetime] = mapped_column(default=utcnow)


class ThresholdVersion(Base):
    __tablename__ = "threshold_versions"
    __table_args__ = (UniqueConstraint("asset_id", "version"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    asset_id: Mapped[str] = mapped_column(String(64), ForeignKey("assets.asset_id"))
    version: Mapped[int] = mapped_column(Integer)
    warning: Mapped[float] = mapped_column(Float)
    critical: Mapped[float] = mapped_column(Float)
    on_k: Mapped[int] = mapped_column(Integer)
    on_n: Mapped[int] = mapped_column(Integer)
    off_m: Mapped[int] = mapped_column(Integer)
    deadband_frac: Mapped[float] = mapped_column(Float)
    origin: Mapped[str] = mapped_column(String(16))  # calibrated | manual | budget | rollback
    budget_per_week: Mapped[float | None] = mapped_column(Float, default=None)
    reason: Mapped[str] = mapped_column(Text, default="")
    created_by: Mapped[str] = mapped_column(String(128))
    created_at: Mapped[datetime] = mapped_column(default=utcnow)
    model_id: Mapped[str] = mapped_column(String(64))
    model_version: Mapped[str] = mapped_column(String(64))


class Alert(Base):
    __tablename__ = "alerts"
    __table_args__ = (
        Index("ix_alerts_opened_id", "opened_at", "id"),
        Index("ix_alerts_asset_opened", "asset_id", "opened_at"),
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    asset_id: Mapped[str] = mapped_column(String(64), ForeignKey("assets.asset_id"))
    severity: Mapped[str] = mapped_column(String(16))  # warning | critical
    state: Mapped[str] = mapped_column(String(16), default="unacknowledged")
    condition: Mapped[str] = mapped_column(String(16), default="active")  # active | returned
    # = asset_id while the rule holds this alert open; NULL afterwards. UNIQUE: one per asset.
    active_key: Mapped[str | None] = mapped_column(String(64), unique=True, default=None)
    opened_at: Mapped[datetime] = mapped_column()  # end of the window that opened it
    last_seen_at: Mapped[datetime] = mapped_column()
    returned_at: Mapped[datetime | None] = mapped_column(default=None)
    peak_score: Mapped[float] = mapped_column(Float)
    peak_at: Mapped[datetime] = mapped_column()
    top_channels: Mapped[list[Any]] = mapped_column(JSON)  # [{"channel": str, "share": float}], at the peak
    model_id: Mapped[str] = mapped_column(String(64))
    model_version: Mapped[str] = mapped_column(String(64))
    threshold_version_id: Mapped[int | None] = mapped_column(ForeignKey("threshold_versions.id"), default=None)
    acknowledged_at: Mapped[datetime | None] = mapped_column(default=None)
    acknowledged_by: Mapped[str | None] = mapped_column(String(128), default=None)
    closed_at: Mapped[datetime | None] = mapped_column(default=None)
    closed_by: Mapped[str | None] = mapped_column(String(128), default=None)
    outcome: Mapped[str | None] = mapped_column(String(32), default=None)
    close_note: Mapped[str | None] = mapped_column(Text, default=None)
    # Backfill (service/stream.py, issue 12): opened by a backfill of history; sends no notification.
    backfilled: Mapped[bool] = mapped_column(Boolean, default=False, server_default=sa_false())


class AlertEvent(Base):
    __tablename__ = "alert_events"
    __table_args__ = (Index("ix_alert_events_alert_at", "alert_id", "at"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    alert_id: Mapped[int] = mapped_column(ForeignKey("alerts.id"))
    at: Mapped[datetime] = mapped_column()
    kind: Mapped[str] = mapped_column(String(16))  # opened | escalated | returned | acknowledged | note | closed
    actor: Mapped[str] = mapped_column(String(128))
    note: Mapped[str | None] = mapped_column(Text, default=None)
    details: Mapped[dict[str, Any] | None] = mapped_column(JSON, default=None)


class AuditLog(Base):
    __tablename__ = "audit_log"
    __table_args__ = (Index("ix_audit_log_at", "at"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    at: Mapped[datetime] = mapped_column(default=utcnow)
    actor: Mapped[str] = mapped_column(String(128))
    action: Mapped[str] = mapped_column(String(64))
    target: Mapped[str] = mapped_column(String(256))
    details: Mapped[dict[str, Any] | None] = mapped_column(JSON, default=None)


# --- cluster state (issue 11): what every worker and replica must agree on -------------------
# The model version each model id serves, counters other processes poll (the registry
# generation), secrets made once for the whole cluster, dashboard sessions and failed
# authentications. Nothing here lives only in one process's memory.


class ModelBinding(Base):
    """The version of a model id the whole cluster serves; moved only by a reload (service/db/bindings.py)."""

    __tablename__ = "model_bindings"

    model_id: Mapped[str] = mapped_column(String(64), primary_key=True)
    version: Mapped[str] = mapped_column(String(64))
    switched_at: Mapped[datetime] = mapped_column(default=utcnow)
    switched_by: Mapped[str] = mapped_column(String(128))


class ClusterCounter(Base):
    """A named counter processes poll cheaply (one row by key): `registry_generation` moves on every model switch."""

    __tablename__ = "cluster_counters"

    name: Mapped[str] = mapped_column(String(64), primary_key=True)
    value: Mapped[int] = mapped_column(BigInteger, default=0)


class ClusterSecret(Base):
    """A random secret made once for the cluster (the dashboard's session signing key when no setting gives one)."""

    __tablename__ = "cluster_secrets"

    name: Mapped[str] = mapped_column(String(64), primary_key=True)
    value: Mapped[str] = mapped_column(Text)
    created_at: Mapped[datetime] = mapped_column(default=utcnow)


class WebSessionRow(Base):
    """A signed-in dashboard session; the cookie carries its id, this row says whether it still holds."""

    __tablename__ = "web_sessions"
    __table_args__ = (Index("ix_web_sessions_key_id", "key_id"),)

    sid_hash: Mapped[str] = mapped_column(String(64), primary_key=True)  # sha256 hex of the cookie's session id
    key_id: Mapped[int] = mapped_column(ForeignKey("api_keys.id"))
    created_at: Mapped[datetime] = mapped_column(default=utcnow)
    expires_at: Mapped[datetime] = mapped_column()
    ended_at: Mapped[datetime | None] = mapped_column(default=None)  # sign-out or key revocation


class AuthFailure(Base):
    """One failed authentication from a client address (service/api/ratelimit.py counts them across workers)."""

    __tablename__ = "auth_failures"
    __table_args__ = (Index("ix_auth_failures_address_at", "address", "at_ms"), Index("ix_auth_failures_at", "at_ms"))

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    address: Mapped[str] = mapped_column(String(64))
    at_ms: Mapped[int] = mapped_column(BigInteger)  # epoch milliseconds, UTC


# --------------------------------------------------------------------------- notifications (issue 14)
# Routing rules and the outbox the alert transitions write in their own transaction
# (service/db/outbox.py); the background sender (service/notifier.py) delivers them.

NOTIFY_CHANNELS = ("webhook", "email")
NOTIFY_EVENTS = ("opened", "escalated", "returned", "unacknowledged")
OUTBOX_STATES = ("pending", "sending", "sent", "dead")


class NotifyRoute(Base):
    """Who hears about which alerts: a channel and target, narrowed by asset and severity."""

    __tablename__ = "notify_routes"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(64), unique=True)
    channel: Mapped[str] = mapped_column(String(16))  # webhook | email
    target: Mapped[str] = mapped_column(Text)  # a webhook URL, or comma-separated e-mail addresses
    asset_id: Mapped[str | None] = mapped_column(String(64), default=None)  # None = every asset
    min_severity: Mapped[str] = mapped_column(String(16), default="warning")  # warning = both, critical = critical only
    events: Mapped[list[Any]] = mapped_column(JSON)  # subset of NOTIFY_EVENTS
    # Signs webhook bodies (HMAC-SHA256); kept as given because signing needs it. None for e-mail.
    secret: Mapped[str | None] = mapped_column(String(128), default=None)
    enabled: Mapped[int] = mapped_column(Integer, default=1)
    created_by: Mapped[str] = mapped_column(String(128))
    created_at: Mapped[datetime] = mapped_column(default=utcnow)


class NotifyOutbox(Base):
    """One message to deliver: written with the alert transition, claimed under a lease."""

    __tablename__ = "notify_outbox"
    __table_args__ = (
        Index("ix_notify_outbox_status_due", "status", "next_attempt_at"),
        Index("ix_notify_outbox_alert", "alert_id"),
    )

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    # (alert, transition, route) once: a second write of the same transition fails here.
    idempotency_key: Mapped[str] = mapped_column(String(128), unique=True)
    route_id: Mapped[int] = mapped_column(ForeignKey("notify_routes.id"))
    alert_id: Mapped[int | None] = mapped_column(ForeignKey("alerts.id"), default=None)  # None for a test message
    kind: Mapped[str] = mapped_column(String(16))  # NOTIFY_EVENTS or "test"
    payload: Mapped[dict[str, Any]] = mapped_column(JSON)
    status: Mapped[str] = mapped_column(String(16), default="pending")  # OUTBOX_STATES
    attempts: Mapped[int] = mapped_column(Integer, default=0)
    next_attempt_at: Mapped[datetime] = mapped_column(default=utcnow)
    lease_until: Mapped[datetime | None] = mapped_column(default=None)
    lease_owner: Mapped[str | None] = mapped_column(String(64), default=None)
    last_error: Mapped[str | None] = mapped_column(Text, default=None)
    created_at: Mapped[datetime] = mapped_column(default=utcnow)
    sent_at: Mapped[datetime | None] = mapped_column(default=None)
