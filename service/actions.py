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
from datetime import datetime, timedelta, timezone
from typing import Any

from sqlalchemy.orm import Session

from service.alerting import AlertRule, rule_of
from service.caller import Caller
from service.db import alerts as alert_q
from service.db import thresholds as threshold_q
from service.db.models import Alert, AlertEvent, Asset, ThresholdVersion
from service.db.alerts import just_after
from service.errors import BadInput
from service.models_registry import LoadedModel, ModelRegistry
from service.retune import PastAlert, Preview, calibration_set, preview
from service.retune_risk import MIN_RISKY_REASON, ConfirmationMissing, RetuneRisk, assess, check_confirmation

# How much stored history a preview replays unless asked otherwise.
PREVIEW_DEFAULT = timedelta(days=30)

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


@dataclass(frozen=True)
class Confirmation:
    """What the person changing a threshold has confirmed (service/retune_risk.py names the risks)."""

    missed: list[int]  # ids of confirmed faults the change is known to miss
    short_history: bool  # the preview rests on less history than MIN_HISTORY_DAYS


def change_threshold(
    session: Session, registry: ModelRegistry, *, caller: Caller, asset_id: str, reason: str, propose: Propose,
    confirm: Confirmation,
) -> tuple[ThresholdVersion, LoadedModel]:
    """A new threshold version: `propose` turns the rule in force (read under the asset's
    lock) into the new one; the change is replayed over the stored scores first and a risky
    one (a confirmed fault missed, too little history) needs `confirm` to name each risk and
    a longer reason (BadInput otherwise); audited with the caller as actor and the risks."""
    asset = lock_asset(session, asset_id=asset_id)
    model, current = _in_force(session, registry, asset)
    current_rule = rule_of(current)
    change = propose(current_rule, model)
    risk = preview_change(session, asset=asset, model=model, current=current_rule, proposed=change.rule).risk
    confirm_change(risk, confirm_missed=confirm.missed, confirm_short_history=confirm.short_history, reason=reason)
    row = threshold_q.set_threshold(
        session, asset=asset, rule=change.rule, origin=change.origin, reason=reason, actor=caller.name,
        manifest=model.manifest, budget_per_week=change.budget_per_week, details={**(change.details or {}), **risk.audit()},
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


# --------------------------------------------------------------------------- retune checks


@dataclass(frozen=True)
class Previewed:
    """A proposal replayed over the asset's stored scores, with its risks (service/retune_risk.py)."""

    since: datetime
    until: datetime
    past: list[PastAlert]
    result: Preview
    risk: RetuneRisk


def preview_change(
    db: Session, *, asset: Asset, model: LoadedModel, current: AlertRule, proposed: AlertRule,
    since: datetime | None = None, until: datetime | None = None,
) -> Previewed:
    """The preview the endpoint answers and the check a change must pass (the PUT and the
    dashboard's Apply): the asset's stored scores in [since, until) replayed under both rules.
    Default range: the PREVIEW_DEFAULT before the asset's newest stored window."""
    if until is None:
        # The asset's newest stored window (now, for a live asset; the replay's end for history).
        until = just_after(asset.last_window_end_ms) if asset.last_window_end_ms is not None else datetime.now(timezone.utc)
    since = since or until - PREVIEW_DEFAULT
    if until <= since:
        raise BadInput("until must be after since", field="body.until")
    series = threshold_q.score_series(db, asset_id=asset.asset_id, model_id=model.model_id, since=since, until=until)
    past = threshold_q.past_alerts(db, asset_id=asset.asset_id, since=since, until=until)
    try:
        cal = calibration_set(model.calibration, model.manifest)
    except ValueError:
        cal = None
    result = preview(series, proposed, current, past, cal)
    risk = assess(result, past, current_warning=current.warning, window_period_s=model.manifest.window_period_s)
    return Previewed(since, until, past, result, risk)


def confirm_change(risk: RetuneRisk, *, confirm_missed: list[int], confirm_short_history: bool, reason: str) -> None:
    """BadInput naming the confirmation field and the risk when a risky change is not confirmed."""
    try:
        check_confirmation(risk, confirm_missed=confirm_missed, confirm_short_history=confirm_short_history, reason=reason)
    except ConfirmationMissing as e:
        raise BadInput(
            str(e), field=f"body.{e.field}",
            details={"needs_confirmation": risk.needs_confirmation, "missed_confirmed_faults": risk.missed_ids,
                     "history_days": round(risk.history_days, 3), "min_reason": MIN_RISKY_REASON},
        ) from None
