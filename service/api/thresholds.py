"""Threshold and shelving routes: the settings in force, preview, new versions (by value,
by false-alarm budget, timing only, or rollback), history, shelve and unshelve.

Reading needs a maintenance key; preview, changes and shelving an operator key.

Proposed rule from a body (preview and PUT alike): timing fields given override the
timing in force; levels come from `warning` (and `critical`, else critical keeps the
critical/warning ratio in force), or from `false_alarms_per_week` (warning from the
model's calibration scores through service.thresholds.threshold_for_budget with the
proposed timing, critical at the same ratio), or stay as they are.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from typing import Annotated

from fastapi import APIRouter, Path
from sqlalchemy.orm import Session

from service import actions
from service.alerting import AlertRule, manifest_rule, rule_of
from service.api.deps import DbSession, MaintenanceCaller, OperatorCaller, RegistryDep, WriteSession
from service.api.schemas_alerts import (
    BudgetOut,
    PreviewIn,
    PreviewOut,
    RiskOut,
    ShelveIn,
    ShelveOut,
    StoredAlertCounts,
    ThresholdHistory,
    ThresholdOut,
    ThresholdProposal,
    ThresholdPut,
    WouldOpenOut,
    rule_out,
    threshold_out,
)
from service.db import thresholds as q
from service.db.alerts import from_ms, just_after
from service.db.models import Asset, ThresholdVersion
from service.errors import BadInput
from service.models_registry import LoadedModel, ModelRegistry
from service.retune import TIMING_FIELDS, PastAlert, Preview, Proposal, ProposedAlert, calibration_set, preview, propose_rule
from service.retune_risk import MIN_HISTORY_DAYS, MIN_RISKY_REASON, ConfirmationMissing, RetuneRisk, assess, check_confirmation
from service.thresholds import calibrated_reason

router = APIRouter(prefix="/v1/assets/{asset_id}", tags=["thresholds"])

AssetId = Annotated[str, Path(min_length=1, max_length=64, pattern=r"^[A-Za-z0-9_.\-]+$")]
PREVIEW_DEFAULT = actions.PREVIEW_DEFAULT
PREVIEW_NOTE = (
    "Replayed from a quiet rule state at the first stored window in the range, shelving not "
    "replayed; expected false alarms per week come from the model's held-out normal calibration scores."
)


def _model(registry: ModelRegistry, asset: Asset) -> LoadedModel:
    return registry.get(asset.model_id)


def _in_force(db: DbSession, asset: Asset, model: LoadedModel) -> ThresholdVersion:
    """The stored version in force, or (before the first is stored) version 1 as the manifest gives it."""
    current = q.threshold_in_force(db, asset_id=asset.asset_id)
    if current is not None:
        return current
    rule = manifest_rule(model.manifest)
    return ThresholdVersion(
        asset_id=asset.asset_id,
        version=1,
        warning=rule.warning,
        critical=rule.critical,
        on_k=rule.on_k,
        on_n=rule.on_n,
        off_m=rule.off_m,
        deadband_frac=rule.deadband_frac,
        origin="calibrated",
        budget_per_week=model.manifest.thresholds.warning_budget_per_week,
        reason=calibrated_reason(model.manifest.thresholds.method, model.manifest.provisional is not None),
        created_by=f"model {model.model_id}/{model.version}",
        created_at=asset.created_at,
        model_id=model.model_id,
        model_version=model.version,
    )


def _propose(body: ThresholdProposal, current: AlertRule, model: LoadedModel) -> Proposal:
    cal = None
    if body.false_alarms_per_week is not None:
        try:
            cal = calibration_set(model.calibration, model.manifest)
        except ValueError as e:
            raise BadInput(f"cannot turn that budget into a threshold: {e}", field="body.false_alarms_per_week") from None
    try:
        return propose_rule(
            current,
            warning=body.warning,
            critical=body.critical,
            false_alarms_per_week=body.false_alarms_per_week,
            on_k=body.on_k,
            on_n=body.on_n,
            off_m=body.off_m,
            deadband_frac=body.deadband_frac,
            cal=cal,
        )
    except ValueError as e:
        field = "body.false_alarms_per_week" if body.false_alarms_per_week is not None else "body"
        raise BadInput(f"proposed rule: {e}", field=field) from None


@router.get("/threshold", response_model=ThresholdOut)
def get_threshold(asset_id: AssetId, db: DbSession, _caller: MaintenanceCaller, registry: RegistryDep) -> ThresholdOut:
    asset = q.get_asset(db, asset_id=asset_id)
    model = _model(registry, asset)
    return threshold_out(_in_force(db, asset, model), model.manifest.window_period_s)


@router.get("/threshold/history", response_model=ThresholdHistory)
def threshold_history(asset_id: AssetId, db: DbSession, _caller: MaintenanceCaller, registry: RegistryDep) -> ThresholdHistory:
    asset = q.get_asset(db, asset_id=asset_id)
    model = _model(registry, asset)
    versions = q.threshold_history(db, asset_id=asset_id) or [_in_force(db, asset, model)]
    return ThresholdHistory(items=[threshold_out(v, model.manifest.window_period_s) for v in versions])


def _would_open(alerts: list[ProposedAlert]) -> list[WouldOpenOut]:
    return [
        WouldOpenOut(
            start=from_ms(a.start_ms), end=from_ms(a.end_ms), severity=a.severity, peak=a.peak, peak_at=from_ms(a.peak_at_ms), returned=a.returned
        )
        for a in alerts
    ]


def risk_out(risk: RetuneRisk) -> RiskOut:
    return RiskOut(
        needs_confirmation=risk.needs_confirmation,
        missed_confirmed_faults=risk.missed_ids,
        confirmed_faults_in_range=risk.confirmed_total,
        history_days=risk.history_days,
        min_history_days=MIN_HISTORY_DAYS,
        warning_factor=risk.warning_factor,
        big_change=risk.big_change,
        statements=risk.statements() + ([risk.change_note()] if risk.big_change else []),
        min_reason=MIN_RISKY_REASON if risk.needs_confirmation else 3,
    )


@router.post("/threshold/preview", response_model=PreviewOut)
def preview_threshold(asset_id: AssetId, body: PreviewIn, db: DbSession, _caller: OperatorCaller, registry: RegistryDep) -> PreviewOut:
    asset = q.get_asset(db, asset_id=asset_id)
    model = _model(registry, asset)
    current = rule_of(_in_force(db, asset, model))
    proposed = _propose(body, current, model)
    done = actions.preview_change(db, asset=asset, model=model, current=current, proposed=proposed.rule, since=body.since, until=body.until)
    since, until, past, result = done.since, done.until, done.past, done.result
    counts = q.stored_counts(past)
    budget = (
        BudgetOut(
            false_alarms_per_week=proposed.budget.choice.budget_per_week,
            method=proposed.budget.choice.method,
            detail={k: float(v) for k, v in proposed.budget.choice.detail.items()},
        )
        if proposed.budget is not None
        else None
    )
    return PreviewOut(
        asset_id=asset_id,
        since=since,
        until=until,
        windows=result.windows,
        rule=rule_out(proposed.rule),
        current_rule=rule_out(current),
        by_budget=budget,
        alerts_would_open=_would_open(result.proposed),
        would_open_count=len(result.proposed),
        overlap_confirmed_fault=result.overlap_confirmed_fault,
        overlap_false_alarm=result.overlap_false_alarm,
        current_alerts=_would_open(result.current),
        current_count=len(result.current),
        stored_alerts=StoredAlertCounts(**counts.__dict__),
        expected_false_alarms_per_week=result.expected_false_alarms_per_week,
        current_expected_false_alarms_per_week=result.current_expected_false_alarms_per_week,
        risk=risk_out(done.risk),
        note=PREVIEW_NOTE,
    )


@router.put("/threshold", response_model=ThresholdOut)
def put_threshold(asset_id: AssetId, body: ThresholdPut, db: WriteSession, caller: OperatorCaller, registry: RegistryDep) -> ThresholdOut:
    if body.rollback_to is not None:
        row, model = actions.rollback_threshold(db, registry, caller=caller, asset_id=asset_id, to_version=body.rollback_to, reason=body.reason)
    else:
        row, model = actions.change_threshold(
            db, registry, caller=caller, asset_id=asset_id, reason=body.reason,
            propose=lambda current, m: _change(body, current, m),
            confirm=actions.Confirmation(missed=list(body.confirm_missed or []), short_history=bool(body.confirm_short_history)),
        )
    out = threshold_out(row, model.manifest.window_period_s)
    db.commit()
    return out


def _change(body: ThresholdPut, current: AlertRule, model: LoadedModel) -> actions.RuleChange:
    changes = [f for f in ("warning", "false_alarms_per_week", *TIMING_FIELDS) if getattr(body, f) is not None]
    if not changes:
        raise BadInput(
            "nothing to change: give warning (and optional critical), false_alarms_per_week, rule timing "
            "(on_k, on_n, off_m, deadband_frac) or rollback_to",
            field="body",
        )
    proposed = _propose(body, current, model)
    return actions.RuleChange(
        rule=proposed.rule,
        origin="budget" if proposed.budget is not None else "manual",
        budget_per_week=body.false_alarms_per_week,
        details={"method": proposed.budget.choice.method} if proposed.budget is not None else None,
    )


def _shelve_out(asset: Asset) -> ShelveOut:
    return ShelveOut(
        asset_id=asset.asset_id,
        shelved=q.is_shelved(asset),
        shelved_until=asset.shelved_until,
        shelve_reason=asset.shelve_reason,
        shelved_by=asset.shelved_by,
    )


@router.post("/shelve", response_model=ShelveOut)
def shelve(asset_id: AssetId, body: ShelveIn, db: WriteSession, caller: OperatorCaller) -> ShelveOut:
    asset = actions.shelve_asset(db, caller=caller, asset_id=asset_id, until=body.until, reason=body.reason)
    out = _shelve_out(asset)
    db.commit()
    return out


@router.delete("/shelve", response_model=ShelveOut)
def unshelve(asset_id: AssetId, db: WriteSession, caller: OperatorCaller) -> ShelveOut:
    asset = actions.unshelve_asset(db, caller=caller, asset_id=asset_id)
    out = _shelve_out(asset)
    db.commit()
    return out
