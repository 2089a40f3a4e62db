"""The actions people take on alerts and assets: one home for the API and the dashboard.

Both front ends call these functions inside their write transaction, so an acknowledge,
a close, a threshold change, a rollback or a shelving takes the same row lock, the same
checks and writes the same audit trail whichever screen or script asked for it:

* alerts: the alert row is locked (FOR UPDATE on PostgreSQL; SQLite's write lock) by
  service/db/alerts.py before its state is read, so two closes of one alert give one
  close and one Conflict naming the state it is in;
* assets: the asset row is locked first (`lock_asset`), so two changes to one asset's
  threshold or shelving take turns instead of racing for the next version number.

The caller commits (service/db's rule: these functions add and flush).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from sqlalchemy.orm import Session

from service.alerting import AlertRule
from service.caller import Caller
from service.db import alerts as alert_q
from service.db import thresholds as threshold_q
from service.db.models import Alert, AlertEvent, Asset, ThresholdVersion
from service.models_registry import LoadedModel, ModelRegistry

# --------------------------------------------------------------------------- alerts


def acknowledge_alert(session: Session, *, caller: Caller, alert_id: int, note: str | None) -> Alert:
    alert_q.get_alert(session, alert_id=alert_id, allowed_assets=caller.assets)  # NotFound for assets the caller may not see
    return alert_q.acknowledge(session, alert_id=alert_id, actor=caller.name, note=note)


def close_alert(session: Session, *, caller: Caller, alert_id: int, outcome: str, note: str | None) -> Alert:
    alert_q.get_alert(session, alert_id=alert_id, allowed_assets=caller.assets)
    return alert_q.close(session, alert_id=alert_id, actor=caller.name, outcome=outcome, note=note)


def note_alert(session: Session, *, caller: Caller, alert_id: int, note: str) -> AlertEvent:
    alert_q.get_alert(session, alert_id=alert_id, allowed_assets=caller.assets)
    return alert_q.add_note(session, alert_id=alert_id, actor=caller.name, note=note)


# --------------------------------------------------------------------------- assets


def lock_asset(session: Session, *, asset_id: str) -> Asset:
    """The asset row, locked until the transaction ends; NotFound if there is none."""
    return threshold_q.get_asset(session, asset_id=asset_id, for_update=True)


@dataclass(frozen=True)
class RuleChange:
    """A new rule worked out from the one in force (by value, by budget or timing only)."""

    rule: AlertRule
    origin: str  # manual | budget
    budget_per_week: float | None = None
    details: dict[str, Any] | None = None


Propose = Callable[[AlertRule, LoadedModel], RuleChange]


def _in_force(session: Session, registry: ModelRegistry, asset: Asset) -> tuple[LoadedModel, ThresholdVersion]:
    model = registry.get(asset.model_id)  # ModelError when the asset's model is not served now
    return model, threshold_q.ensure_initial_version(session, asset=asset, manifest=model.manifest)


def change_threshold(
    session: Session, registry: ModelRegistry, *, caller: Caller, asset_id: str, reason: str, propose: Propose
) -> tuple[ThresholdVersion, LoadedModel]:
    """A new threshold version: `propose` turns the rule in force (read under the asset's
    lock) into the new one; audited with the caller as actor."""
    asset = lock_asset(session, asset_id=asset_id)
    model, current = _in_force(session, registry, asset)
    change = propose(threshold_q.rule_of(current), model)
    row = threshold_q.set_threshold(
        session, asset=asset, rule=change.rule, origin=change.origin, reason=reason, actor=caller.name,
        manifest=model.manifest, budget_per_week=change.budget_per_week, details=change.details,
    )
    return row, model


def rollback_threshold(
    session: Session, registry: ModelRegistry, *, caller: Caller, asset_id: str, to_version: int, reason: str
) -> tuple[ThresholdVersion, LoadedModel]:
    """A new version copying `to_version`'s levels and timing; audited."""
    asset = lock_asset(session, asset_id=asset_id)
    model, _ = _in_force(session, registry, asset)
    row = threshold_q.rollback(session, asset=asset, to_version=to_version, reason=reason, actor=caller.name, manifest=model.manifest)
    return row, model


def shelve_asset(
    session: Session, *, caller: Caller, asset_id: str, until: datetime, reason: str, now: datetime | None = None
) -> Asset:
    asset = lock_asset(session, asset_id=asset_id)
    return threshold_q.shelve(session, asset=asset, until=until, reason=reason, actor=caller.name, now=now)


def unshelve_asset(session: Session, *, caller: Caller, asset_id: str) -> Asset:
    asset = lock_asset(session, asset_id=asset_id)
    return threshold_q.unshelve(session, asset=asset, actor=caller.name)
