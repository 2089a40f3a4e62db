"""Queries of the ingest path: assets, readings, window scores, skipped (gap) windows,
the threshold in force, asset listings and retention. Keyword-only and typed, so the
routers, the dashboard and the commands share them.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from functools import cache
from datetime import datetime, timezone
from typing import Any

from sqlalchemy import Integer, Select, and_, bindparam, delete, func, insert, or_, select
from sqlalchemy.orm import Session

from service.db.models import Alert, Asset, Reading, SkippedWindow, ThresholdVersion, WindowScore

IN_CHUNK = 500  # bound parameters per IN (...) list, well inside every engine's limit


def ms_to_dt(ms: int) -> datetime:
    return datetime.fromtimestamp(ms / 1000.0, tz=timezone.utc)


def dt_to_ms(dt: datetime) -> int:
    return int(round(dt.timestamp() * 1000))


def _chunks(items: Sequence[Any], n: int = IN_CHUNK) -> Iterable[Sequence[Any]]:
    for i in range(0, len(items), n):
        yield items[i : i + n]


# Statements asked on every request are built once, with bound parameters, and reused:
# building a select (operator overloading, coercions, its cache key) costs about as much as
# running it on SQLite. The ingest path's own statements are in service/db/ingest_sql.py.


@cache
def _asset_for_update() -> Select[Any]:
    return select(Asset).where(Asset.asset_id == bindparam("asset_id")).with_for_update()


@cache
def _active_alert() -> Select[Any]:
    return select(Alert).where(Alert.active_key == bindparam("asset_id"))


@cache
def _existing_readings() -> Select[Any]:
    return select(Reading.ts_ms, Reading.values).where(
        Reading.asset_id == bindparam("asset_id"), Reading.ts_ms.in_(bindparam("ts_ms", expanding=True))
    )


@cache
def _readings_between(limited: bool) -> Select[Any]:
    q = (
        select(Reading.ts_ms, Reading.values)
        .where(Reading.asset_id == bindparam("asset_id"), Reading.ts_ms >= bindparam("start_ms"), Reading.ts_ms < bindparam("end_ms"))
        .order_by(Reading.ts_ms)
    )
    return q.limit(bindparam("limit", type_=Integer)) if limited else q


@cache
def _window_ends_in(table: type[WindowScore] | type[SkippedWindow]) -> Select[Any]:
    return select(table.window_end_index).where(
        table.asset_id == bindparam("asset_id"),
        table.model_id == bindparam("model_id"),
        table.model_version == bindparam("model_version"),
        table.window_end_index >= bindparam("lo"),
        table.window_end_index <= bindparam("hi"),
    )


# --- assets and the threshold in force -------------------------------------------------


def get_asset(session: Session, *, asset_id: str, for_update: bool = False) -> Asset | None:
    """The asset row; `for_update` locks it for the transaction (PostgreSQL; SQLite's write
    transaction already excludes other writers), so one asset's batches ingest one at a time."""
    if for_update:
        return session.scalars(_asset_for_update(), {"asset_id": asset_id}).first()
    return session.get(Asset, asset_id)


def create_asset(session: Session, *, asset_id: str, model_id: str) -> Asset:
    """A new asset bound to `model_id` (its threshold version 1 comes from the manifest:
    service.db.thresholds.ensure_initial_version)."""
    asset = Asset(asset_id=asset_id, model_id=model_id)
    session.add(asset)
    session.flush()
    return asset


def latest_threshold(session: Session, *, asset_id: str) -> ThresholdVersion | None:
    from service.db.thresholds import threshold_in_force  # the one query (that module imports this one's neighbours)

    return threshold_in_force(session, asset_id=asset_id)


def add_threshold_version(
    session: Session,
    *,
    asset_id: str,
    rule: dict[str, float],
    origin: str,
    reason: str,
    created_by: str,
    model_id: str,
    model_version: str,
    budget_per_week: float | None = None,
) -> ThresholdVersion:
    prev = latest_threshold(session, asset_id=asset_id)
    row = ThresholdVersion(
        asset_id=asset_id,
        version=(prev.version + 1) if prev else 1,
        warning=float(rule["warning"]),
        critical=float(rule["critical"]),
        on_k=int(rule["on_k"]),
        on_n=int(rule["on_n"]),
        off_m=int(rule["off_m"]),
        deadband_frac=float(rule["deadband_frac"]),
        origin=origin,
        budget_per_week=budget_per_week,
        reason=reason,
        created_by=created_by,
        model_id=model_id,
        model_version=model_version,
    )
    session.add(row)
    session.flush()
    return row


def active_alert(session: Session, *, asset_id: str) -> Alert | None:
    """The alert the rule holds open for this asset (UNIQUE active_key), if any."""
    return session.scalars(_active_alert(), {"asset_id": asset_id}).first()


# --- readings ------------------------------------------------------------------------------


def existing_readings(session: Session, *, asset_id: str, ts_ms: Sequence[int]) -> dict[int, dict[str, Any]]:
    """Stored values of those of `ts_ms` the asset already has."""
    found: dict[int, dict[str, Any]] = {}
    unique = sorted(set(ts_ms))
    conn = session.connection()
    for part in _chunks(unique):
        rows = conn.execute(_existing_readings(), {"asset_id": asset_id, "ts_ms": list(part)})
        found.update({int(t): v for t, v in rows})
    return found


def reading_span_ms(session: Session, *, asset_id: str) -> tuple[int | None, int | None]:
    """(oldest, newest) stored reading time of the asset in epoch ms."""
    # Two scalar subqueries, each a single index seek: min() and max() in one SELECT make
    # SQLite walk every index entry of the asset (cost growing with its history).
    lo_q = select(func.min(Reading.ts_ms)).where(Reading.asset_id == asset_id).scalar_subquery()
    hi_q = select(func.max(Reading.ts_ms)).where(Reading.asset_id == asset_id).scalar_subquery()
    lo, hi = session.execute(select(lo_q, hi_q)).one()
    return (int(lo) if lo is not None else None, int(hi) if hi is not None else None)


def readings_between(
    session: Session, *, asset_id: str, start_ms: int, end_ms: int, limit: int | None = None
) -> list[tuple[int, dict[str, Any]]]:
    """(ts_ms, values) with start_ms <= ts_ms < end_ms, oldest first."""
    params: dict[str, Any] = {"asset_id": asset_id, "start_ms": start_ms, "end_ms": end_ms}
    if limit is not None:
        params["limit"] = limit
    return [(int(t), v) for t, v in session.connection().execute(_readings_between(limit is not None), params)]


# --- window scores and skipped windows ----------------------------------------------------


def window_ends_in(
    session: Session, *, table: type[WindowScore] | type[SkippedWindow], asset_id: str, model_id: str, model_version: str, lo: int, hi: int
) -> set[int]:
    """Window-end grid indexes lo..hi already recorded in `table` for this asset and model version."""
    rows = session.connection().scalars(
        _window_ends_in(table), {"asset_id": asset_id, "model_id": model_id, "model_version": model_version, "lo": lo, "hi": hi}
    )
    return {int(r) for r in rows}


def insert_skipped(session: Session, *, rows: Sequence[dict[str, Any]]) -> None:
    if rows:
        session.connection().execute(insert(SkippedWindow.__table__), list(rows))


def delete_skipped(session: Session, *, asset_id: str, model_id: str, model_version: str, ends: Sequence[int]) -> None:
    for part in _chunks(list(ends)):
        session.execute(
            delete(SkippedWindow).where(
                SkippedWindow.asset_id == asset_id,
                SkippedWindow.model_id == model_id,
                SkippedWindow.model_version == model_version,
                SkippedWindow.window_end_index.in_(part),
            )
        )


@dataclass(frozen=True)
class ScorePoint:
    window_end: datetime
    window_end_index: int
    score: float
    contributions: dict[str, float]
    model_id: str
    model_version: str
    threshold_version_id: int | None
    id: int = 0  # the row's key: with window_end_ms, the page order and the cursor


def asset_scores(
    session: Session,
    *,
    asset_id: str,
    since: datetime,
    until: datetime,
    after: tuple[int, int] | None = None,
    limit: int = 2000,
) -> list[ScorePoint]:
    """Window scores with since <= window end < until, oldest first, ordered by (window end,
    row id) — several model versions may score one window — and keyset-paged on the same
    pair: `after` is the (window_end_ms, id) of the last row of the previous page."""
    q = select(WindowScore).where(
        WindowScore.asset_id == asset_id,
        WindowScore.window_end_ms >= dt_to_ms(since),
        WindowScore.window_end_ms < dt_to_ms(until),
    )
    if after is not None:
        ms, row_id = after
        q = q.where(or_(WindowScore.window_end_ms > ms, and_(WindowScore.window_end_ms == ms, WindowScore.id > row_id)))
    q = q.order_by(WindowScore.window_end_ms, WindowScore.id).limit(limit)
    return [
        ScorePoint(ms_to_dt(r.window_end_ms), r.window_end_index, r.score, r.contributions, r.model_id, r.model_version,
                   r.threshold_version_id, r.id)
        for r in session.scalars(q)
    ]


# --- asset listing -------------------------------------------------------------------------


@dataclass(frozen=True)
class AssetSummary:
    asset_id: str
    model_id: str
    state: str  # normal | alerting | shelved | silent
    created_at: datetime
    last_reading_at: datetime | None
    last_window_end: datetime | None
    last_score: float | None
    warning: float | None
    critical: float | None
    threshold_version: int | None
    shelved_until: datetime | None
    shelve_reason: str | None
    active_alert_id: int | None
    active_severity: str | None
    gap_windows: int  # windows not scored because they spanned a long gap (within retention)
    last_gap_end: datetime | None


def derive_state(
    *, shelved_until: datetime | None, alerting: bool, last_reading_at: datetime | None, now: datetime, silent_after_s: float
) -> str:
    """shelved (until a future time) > alerting (an active alert) > silent (no reading for
    `silent_after_s`, or none yet) > normal."""
    if shelved_until is not None and shelved_until > now:
        return "shelved"
    if alerting:
        return "alerting"
    if last_reading_at is None or (now - last_reading_at).total_seconds() > silent_after_s:
        return "silent"
    return "normal"


def list_assets(
    session: Session,
    *,
    now: datetime,
    silent_after_s: dict[str, float],
    default_silent_after_s: float = 1800.0,
    after: str | None = None,
    limit: int = 500,
) -> list[AssetSummary]:
    """Assets ordered by id (keyset after `after`); `silent_after_s` per model id."""
    q = select(Asset).order_by(Asset.asset_id).limit(limit)
    if after is not None:
        q = q.where(Asset.asset_id > after)
    assets = list(session.scalars(q))
    if not assets:
        return []
    ids = [a.asset_id for a in assets]
    alerts = {a.asset_id: a for a in session.scalars(select(Alert).where(Alert.active_key.in_(ids)))}
    latest_v = (
        select(ThresholdVersion.asset_id, func.max(ThresholdVersion.version).label("v"))
        .where(ThresholdVersion.asset_id.in_(ids))
        .group_by(ThresholdVersion.asset_id)
        .subquery()
    )
    thresholds = {
        t.asset_id: t
        for t in session.scalars(
            select(ThresholdVersion).join(
                latest_v, (ThresholdVersion.asset_id == latest_v.c.asset_id) & (ThresholdVersion.version == latest_v.c.v)
            )
        )
    }
    gaps = {
        a: (int(n), int(last) if last is not None else None)
        for a, n, last in session.execute(
            select(SkippedWindow.asset_id, func.count(), func.max(SkippedWindow.window_end_ms))
            .where(SkippedWindow.asset_id.in_(ids))
            .group_by(SkippedWindow.asset_id)
        )
    }
    out = []
    for a in assets:
        alert, t = alerts.get(a.asset_id), thresholds.get(a.asset_id)
        n_gap, last_gap = gaps.get(a.asset_id, (0, None))
        out.append(
            AssetSummary(
                asset_id=a.asset_id,
                model_id=a.model_id,
                state=derive_state(
                    shelved_until=a.shelved_until,
                    alerting=alert is not None,
                    last_reading_at=a.last_reading_at,
                    now=now,
                    silent_after_s=silent_after_s.get(a.model_id, default_silent_after_s),
                ),
                created_at=a.created_at,
                last_reading_at=a.last_reading_at,
                last_window_end=ms_to_dt(a.last_window_end_ms) if a.last_window_end_ms is not None else None,
                last_score=a.last_score,
                warning=t.warning if t else None,
                critical=t.critical if t else None,
                threshold_version=t.version if t else None,
                shelved_until=a.shelved_until,
                shelve_reason=a.shelve_reason,
                active_alert_id=alert.id if alert else None,
                active_severity=alert.severity if alert else None,
                gap_windows=n_gap,
                last_gap_end=ms_to_dt(last_gap) if last_gap is not None else None,
            )
        )
    return out


# --- retention -----------------------------------------------------------------------------


def prune(session: Session, *, before: datetime) -> dict[str, int]:
    """Delete readings, window scores and skipped windows older than `before`; alerts,
    their events, thresholds and the audit log are kept. Returns rows removed per table."""
    cutoff = dt_to_ms(before)
    removed = {}
    for name, table, col in (
        ("readings", Reading, Reading.ts_ms),
        ("window_scores", WindowScore, WindowScore.window_end_ms),
        ("skipped_windows", SkippedWindow, SkippedWindow.window_end_ms),
    ):
        result = session.execute(delete(table).where(col < cutoff))
        removed[name] = int(result.rowcount or 0)
    return removed
