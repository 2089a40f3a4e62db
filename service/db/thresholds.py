"""Threshold versions, the stored scores a preview replays, and shelving.

Every asset's alert settings live in threshold_versions (levels and rule timing together);
the highest version is in force. Version 1 comes from the manifest when the asset is first
seen (`ensure_initial_version`); later versions are made by operators (origin manual or
budget) or by rolling back (origin rollback: a copy of an old version under a new number).
Each new version and each shelve/unshelve writes an audit_log row. Versions are never
edited or deleted. Rule timing set here lives in the version itself (not in the asset's
`rule_override`), so the version in force says everything the rule uses.

Callers commit; these functions add and flush.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from functools import cache
from typing import Any

import numpy as np
from sqlalchemy import Select, bindparam, func, select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from service.alerting import AlertRule, manifest_rule, rule_of
from service.db.alerts import to_ms
from service.db.models import Alert, Asset, AuditLog, ThresholdVersion, WindowScore
from service.errors import BadInput, Conflict, NotFound
from service.manifest import Manifest
from service.models_registry import version_key
from service.retune import TIMING_FIELDS, PastAlert, ScoreSeries
from service.thresholds import calibrated_reason

MAX_SHELVE = timedelta(days=30)


def get_asset(session: Session, *, asset_id: str, for_update: bool = False) -> Asset:
    """The asset row (locked until commit with `for_update`, so changes to it queue); NotFound if none."""
    asset = session.get(Asset, asset_id, with_for_update=for_update)
    if asset is None:
        raise NotFound(f"no asset {asset_id!r}: it appears once a machine has posted readings for it", field="path.asset_id")
    return asset


def in_force_select(*columns: Any) -> Select[Any]:
    """The one query for the threshold version in force: the asset's highest version
    (bind `asset_id`). Ingest compiles it with the columns it needs (service/db/ingest_sql.py)."""
    t = ThresholdVersion
    return select(*(columns or (t,))).where(t.asset_id == bindparam("asset_id")).order_by(t.version.desc()).limit(1)


@cache
def _in_force() -> Select[Any]:
    # Built once and reused (service/db/readings.py says why).
    return in_force_select()


def threshold_in_force(session: Session, *, asset_id: str) -> ThresholdVersion | None:
    """The asset's highest threshold version, or None before its first."""
    return session.scalars(_in_force(), {"asset_id": asset_id}).first()


def threshold_history(session: Session, *, asset_id: str) -> list[ThresholdVersion]:
    """Every version, newest first."""
    return list(
        session.scalars(select(ThresholdVersion).where(ThresholdVersion.asset_id == asset_id).order_by(ThresholdVersion.version.desc()))
    )


def ensure_initial_version(session: Session, *, asset: Asset, manifest: Manifest) -> ThresholdVersion:
    """The version in force, creating version 1 from the manifest if the asset has none."""
    current = threshold_in_force(session, asset_id=asset.asset_id)
    if current is not None:
        return current
    rule = manifest_rule(manifest)
    return _add_version(
        session,
        asset=asset,
        rule=rule,
        origin="calibrated",
        budget_per_week=manifest.thresholds.warning_budget_per_week,
        reason=calibrated_reason(manifest.thresholds.method, manifest.provisional is not None),
        created_by=f"model {manifest.model_id}/{manifest.version}",
        manifest=manifest,
        audit=False,
    )


def _add_version(
    session: Session,
    *,
    asset: Asset,
    rule: AlertRule,
    origin: str,
    budget_per_week: float | None,
    reason: str,
    created_by: str,
    manifest: Manifest,
    audit: bool = True,
    details: dict[str, Any] | None = None,
) -> ThresholdVersion:
    latest = session.scalar(select(func.max(ThresholdVersion.version)).where(ThresholdVersion.asset_id == asset.asset_id))
    row = ThresholdVersion(
        asset_id=asset.asset_id,
        version=int(latest or 0) + 1,
        warning=float(rule.warning),
        critical=float(rule.critical),
        on_k=rule.on_k,
        on_n=rule.on_n,
        off_m=rule.off_m,
        deadband_frac=float(rule.deadband_frac),
        origin=origin,
        budget_per_week=budget_per_week,
        reason=reason,
        created_by=created_by,
        created_at=datetime.now(timezone.utc),
        model_id=manifest.model_id,
        model_version=manifest.version,
    )
    try:
        with session.begin_nested():
            session.add(row)
            session.flush()
    except IntegrityError:
        raise Conflict(
            f"asset {asset.asset_id!r}: another change made version {row.version} at the same moment; fetch the threshold and retry"
        ) from None
    if audit:
        session.add(
            AuditLog(
                at=row.created_at,
                actor=created_by,
                action="threshold.set",
                target=f"asset:{asset.asset_id}",
                details={
                    "version": row.version,
                    "origin": origin,
                    "warning": row.warning,
                    "critical": row.critical,
                    **{f: getattr(row, f) for f in TIMING_FIELDS},
                    "budget_per_week": budget_per_week,
                    "reason": reason,
                    **(details or {}),
                },
            )
        )
    return row


def set_threshold(
    session: Session,
    *,
    asset: Asset,
    rule: AlertRule,
    origin: str,
    reason: str,
    actor: str,
    manifest: Manifest,
    budget_per_week: float | None = None,
    details: dict[str, Any] | None = None,
) -> ThresholdVersion:
    """A new version (origin manual or budget) with the given levels and timing; audited."""
    if origin not in ("manual", "budget"):
        raise ValueError(f"origin must be manual or budget here, got {origin!r}")
    if not reason.strip():
        raise BadInput("reason must not be blank", field="body.reason")
    return _add_version(
        session, asset=asset, rule=rule, origin=origin, budget_per_week=budget_per_week, reason=reason,
        created_by=actor, manifest=manifest, details=details,
    )


def rollback(session: Session, *, asset: Asset, to_version: int, reason: str, actor: str, manifest: Manifest) -> ThresholdVersion:
    """A new version copying `to_version`'s levels and timing (origin rollback); audited."""
    old = session.scalars(
        select(ThresholdVersion).where(ThresholdVersion.asset_id == asset.asset_id, ThresholdVersion.version == to_version)
    ).first()
    if old is None:
        versions = [v.version for v in threshold_history(session, asset_id=asset.asset_id)]
        raise NotFound(f"asset {asset.asset_id!r} has no threshold version {to_version}; it has {sorted(versions)}", field="body.rollback_to")
    return _add_version(
        session, asset=asset, rule=rule_of(old), origin="rollback", budget_per_week=old.budget_per_week, reason=reason,
        created_by=actor, manifest=manifest, details={"rollback_to": to_version},
    )


# --------------------------------------------------------------------------- preview inputs


def score_series(session: Session, *, asset_id: str, model_id: str, since: datetime, until: datetime) -> ScoreSeries:
    """The asset's stored window scores of `model_id` with window ends in [since, until), in
    window-end order; where two model versions scored the same window, the newer counts. Only
    windows the live rule saw (service/stream.py: not a late window filling a hole behind it),
    so the preview replays what the rule replayed."""
    rows = session.execute(
        select(WindowScore.window_end_ms, WindowScore.score, WindowScore.model_version)
        .where(
            WindowScore.asset_id == asset_id,
            WindowScore.model_id == model_id,
            WindowScore.window_end_ms >= to_ms(since),
            WindowScore.window_end_ms < to_ms(until),
            WindowScore.rule_saw.is_(True),
        )
        .order_by(WindowScore.window_end_ms)
    ).all()
    best: dict[int, tuple[Any, float]] = {}
    for end_ms, score, version in rows:
        key = version_key(version)
        if end_ms not in best or key > best[end_ms][0]:
            best[end_ms] = (key, float(score))
    ends = np.array(sorted(best), dtype=np.int64)
    return ScoreSeries(ends, np.array([best[int(e)][1] for e in ends], dtype=np.float64))


def past_alerts(session: Session, *, asset_id: str, since: datetime, until: datetime) -> list[PastAlert]:
    """The asset's stored alerts whose span meets [since, until)."""
    rows = session.scalars(
        select(Alert).where(Alert.asset_id == asset_id, Alert.opened_at < until, Alert.last_seen_at >= since).order_by(Alert.opened_at)
    )
    return [
        PastAlert(
            alert_id=a.id,
            start_ms=to_ms(a.opened_at),
            end_ms=to_ms(a.returned_at or a.last_seen_at),
            outcome=a.outcome if a.state == "closed" else None,  # type: ignore[arg-type]
        )
        for a in rows
    ]


@dataclass(frozen=True)
class StoredCounts:
    total: int
    confirmed_fault: int
    false_alarm: int
    planned_work: int
    unknown: int
    not_closed: int


def stored_counts(past: Sequence[PastAlert]) -> StoredCounts:
    outcomes = [p.outcome for p in past]
    return StoredCounts(
        total=len(past),
        confirmed_fault=outcomes.count("confirmed_fault"),
        false_alarm=outcomes.count("false_alarm"),
        planned_work=outcomes.count("planned_work"),
        unknown=outcomes.count("unknown"),
        not_closed=outcomes.count(None),
    )


# --------------------------------------------------------------------------- shelving


def shelve(session: Session, *, asset: Asset, until: datetime, reason: str, actor: str, now: datetime | None = None) -> Asset:
    """Suppress new alerts for the asset until `until` (future, at most MAX_SHELVE ahead); audited."""
    now = now or datetime.now(timezone.utc)
    if until <= now:
        raise BadInput(f"until ({until.isoformat()}) must be in the future", field="body.until")
    if until - now > MAX_SHELVE:
        raise BadInput(
            f"until may be at most {MAX_SHELVE.days} days ahead (latest {(now + MAX_SHELVE).isoformat()}); shelve again later if needed",
            field="body.until",
        )
    if not reason.strip():
        raise BadInput("reason must not be blank", field="body.reason")
    previous = asset.shelved_until
    asset.shelved_until, asset.shelve_reason, asset.shelved_by = until, reason, actor
    session.add(
        AuditLog(
            at=now,
            actor=actor,
            action="asset.shelve",
            target=f"asset:{asset.asset_id}",
            details={"until": until.isoformat(), "reason": reason, "previous_until": previous.isoformat() if previous else None},
        )
    )
    session.flush()
    return asset


def unshelve(session: Session, *, asset: Asset, actor: str, now: datetime | None = None) -> Asset:
    """End shelving now (also when it had already lapsed); audited."""
    now = now or datetime.now(timezone.utc)
    previous = asset.shelved_until
    asset.shelved_until, asset.shelve_reason, asset.shelved_by = None, None, None
    session.add(
        AuditLog(
            at=now,
            actor=actor,
            action="asset.unshelve",
            target=f"asset:{asset.asset_id}",
            details={"previous_until": previous.isoformat() if previous else None, "was_active": bool(previous and previous > now)},
        )
    )
    session.flush()
    return asset


def is_shelved(asset: Asset, now: datetime | None = None) -> bool:
    now = now or datetime.now(timezone.utc)
    return asset.shelved_until is not None and asset.shelved_until > now
