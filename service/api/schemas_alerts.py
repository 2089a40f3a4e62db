"""Request and response models of the alert, threshold, shelving, model and alert-health
endpoints. Times are timezone-aware UTC and serialise as ISO-8601 with "Z"."""

from __future__ import annotations

from datetime import datetime, timezone
from typing import Annotated, Any, Literal

from pydantic import AfterValidator, BaseModel, ConfigDict, Field, PlainSerializer, model_validator

Outcome = Literal["confirmed_fault", "false_alarm", "planned_work", "unknown"]
AlertState = Literal["unacknowledged", "acknowledged", "closed"]
Condition = Literal["active", "returned"]
SeverityName = Literal["warning", "critical"]
Origin = Literal["calibrated", "manual", "budget", "rollback"]


def _aware(v: datetime) -> datetime:
    if v.tzinfo is None:
        raise ValueError("give a time zone offset (e.g. 2026-03-01T12:00:00Z); naive times are ambiguous")
    return v.astimezone(timezone.utc)


def _z(v: datetime) -> str:
    return v.astimezone(timezone.utc).isoformat().replace("+00:00", "Z")


# Input: must carry an offset; output: always UTC with "Z".
UtcIn = Annotated[datetime, AfterValidator(_aware)]
UtcOut = Annotated[datetime, PlainSerializer(_z, return_type=str)]
Note = Annotated[str, Field(min_length=1, max_length=4000)]
Reason = Annotated[str, Field(min_length=3, max_length=2000, description="why; kept in the history and audit log")]


class _In(BaseModel):
    model_config = ConfigDict(extra="forbid")


# --------------------------------------------------------------------------- alerts


class ChannelShare(BaseModel):
    channel: str
    share: float


class AlertEventOut(BaseModel):
    at: UtcOut
    kind: str
    actor: str
    note: str | None = None
    details: dict[str, Any] | None = None


class AlertOut(BaseModel):
    id: int
    asset_id: str
    severity: SeverityName
    state: AlertState
    condition: Condition
    opened_at: UtcOut
    last_seen_at: UtcOut
    returned_at: UtcOut | None
    duration_s: float = Field(description="opened to returned, else to last seen")
    peak_score: float
    peak_at: UtcOut
    warning_level: float | None = Field(default=None, description="the warning level in force when it opened")
    peak_ratio: float | None = Field(default=None, description="peak_score / warning_level: 4.2 reads '4.2x warning'")
    top_channels: list[ChannelShare]
    model_id: str
    model_version: str
    threshold_version_id: int | None
    acknowledged_at: UtcOut | None
    acknowledged_by: str | None
    closed_at: UtcOut | None
    closed_by: str | None
    outcome: Outcome | None
    close_note: str | None
    backfilled: bool = Field(default=False, description="opened by a backfill of history (kilter replay --backfill); sends no notification")


class ThresholdOut(BaseModel):
    asset_id: str
    version: int
    warning: float
    critical: float
    on_k: int
    on_n: int
    off_m: int
    deadband_frac: float
    clear_level: float = Field(description="scores below this count towards the return: warning x (1 - deadband)")
    origin: Origin
    budget_per_week: float | None
    reason: str
    created_by: str
    created_at: UtcOut
    model_id: str
    model_version: str
    window_period_s: float | None = Field(description="time between window ends of the model in force")
    on_delay_s: float | None = Field(description="shortest time to open: on_k window periods")
    off_delay_s: float | None = Field(description="shortest time to return: off_m window periods")


class AlertDetail(AlertOut):
    threshold: ThresholdOut | None = Field(description="the threshold version in force when it opened")
    history: list[AlertEventOut]


class AlertPage(BaseModel):
    items: list[AlertOut]
    next_cursor: str | None


class AcknowledgeIn(_In):
    note: Note | None = None


class CloseIn(_In):
    outcome: Outcome
    note: Note | None = None


class NoteIn(_In):
    note: Note


# --------------------------------------------------------------------------- thresholds


class RuleTiming(_In):
    on_k: int | None = Field(default=None, ge=1, le=1000, description="open when k of the last n windows are at/above")
    on_n: int | None = Field(default=None, ge=1, le=1000)
    off_m: int | None = Field(default=None, ge=1, le=1000, description="return after m windows below the clear level")
    deadband_frac: float | None = Field(default=None, ge=0, lt=1)


class ThresholdProposal(RuleTiming):
    """By value (`warning`, optional `critical`) or by budget (`false_alarms_per_week`), not both.

    Neither keeps the levels in force (a timing-only change)."""

    warning: float | None = Field(default=None, gt=0, allow_inf_nan=False)
    critical: float | None = Field(default=None, gt=0, allow_inf_nan=False)
    false_alarms_per_week: float | None = Field(default=None, gt=0, le=10_000, allow_inf_nan=False)

    @model_validator(mode="after")
    def _one_way(self) -> ThresholdProposal:
        if self.false_alarms_per_week is not None and (self.warning is not None or self.critical is not None):
            raise ValueError("give either warning (and optional critical) or false_alarms_per_week, not both")
        if self.critical is not None and self.warning is None:
            raise ValueError("critical needs warning beside it")
        if self.warning is not None and self.critical is not None and self.critical < self.warning:
            raise ValueError(f"critical ({self.critical}) must be >= warning ({self.warning})")
        return self


class PreviewIn(ThresholdProposal):
    since: UtcIn | None = Field(default=None, description="default: 30 days before until")
    until: UtcIn | None = Field(default=None, description="default: now")


class ThresholdPut(ThresholdProposal):
    reason: Reason
    rollback_to: int | None = Field(default=None, ge=1, description="copy this old version as a new one")
    confirm_missed: list[int] = Field(
        default_factory=list, max_length=1000,
        description="ids of alerts closed as confirmed faults that the new levels would have missed (preview risk.missed_confirmed_faults): "
        "a change that misses one is applied only when each is named here, with a reason of at least 15 characters",
    )
    confirm_short_history: bool = Field(
        default=False, description="accept a change previewed on less than 7 asset-days of stored windows (preview risk.needs_confirmation)"
    )

    @model_validator(mode="after")
    def _rollback_alone(self) -> ThresholdPut:
        if self.rollback_to is not None:
            given = [
                k
                for k in ("warning", "critical", "false_alarms_per_week", "on_k", "on_n", "off_m", "deadband_frac")
                if getattr(self, k) is not None
            ]
            if given:
                raise ValueError(f"rollback_to copies an old version whole; drop {', '.join(given)}")
        return self


class RuleOut(BaseModel):
    warning: float
    critical: float
    on_k: int
    on_n: int
    off_m: int
    deadband_frac: float


class WouldOpenOut(BaseModel):
    start: UtcOut
    end: UtcOut
    severity: SeverityName
    peak: float
    peak_at: UtcOut
    returned: bool


class BudgetOut(BaseModel):
    false_alarms_per_week: float
    method: Literal["empirical", "pot", "highest_normal", "spaced"] = Field(description="how the level was found: service.thresholds.METHOD_LABELS")
    detail: dict[str, float]


class StoredAlertCounts(BaseModel):
    total: int
    confirmed_fault: int
    false_alarm: int
    planned_work: int
    unknown: int
    not_closed: int


class RiskOut(BaseModel):
    needs_confirmation: list[Literal["missed_confirmed_faults", "short_history"]] = Field(
        description="what a PUT of this proposal must confirm (confirm_missed, confirm_short_history)"
    )
    missed_confirmed_faults: list[int] = Field(description="alerts closed as confirmed faults that no proposed alert meets")
    confirmed_faults_in_range: int
    history_days: float = Field(description="asset-days of stored windows replayed")
    min_history_days: float
    warning_factor: float = Field(description="proposed warning / warning in force")
    big_change: bool = Field(description="more than 3x or less than 1/3 of the level in force")
    statements: list[str]
    min_reason: int = Field(description="characters the reason needs for this change")


class PreviewOut(BaseModel):
    asset_id: str
    since: UtcOut
    until: UtcOut
    windows: int = Field(description="stored window scores replayed")
    rule: RuleOut = Field(description="the proposed rule, levels and timing, as replayed")
    current_rule: RuleOut
    by_budget: BudgetOut | None
    alerts_would_open: list[WouldOpenOut]
    would_open_count: int
    overlap_confirmed_fault: int = Field(description="proposed alerts meeting alerts closed as confirmed_fault")
    overlap_false_alarm: int = Field(description="proposed alerts meeting alerts closed as false_alarm")
    current_alerts: list[WouldOpenOut] = Field(description="the rule in force replayed over the same scores")
    current_count: int
    stored_alerts: StoredAlertCounts = Field(description="alerts actually stored in the range, by outcome")
    expected_false_alarms_per_week: float | None = Field(description="from the model's calibration scores")
    current_expected_false_alarms_per_week: float | None
    risk: RiskOut
    note: str


class ThresholdHistory(BaseModel):
    items: list[ThresholdOut]
    next_cursor: str | None = None


# --------------------------------------------------------------------------- shelving


class ShelveIn(_In):
    until: UtcIn
    reason: Reason


class ShelveOut(BaseModel):
    asset_id: str
    shelved: bool
    shelved_until: UtcOut | None
    shelve_reason: str | None
    shelved_by: str | None


# --------------------------------------------------------------------------- models


class ModelChannel(BaseModel):
    name: str
    unit: str


class ModelOut(BaseModel):
    model_id: str
    version: str = Field(description="the version served")
    versions_available: list[str]
    created_at: UtcOut
    loaded_at: UtcOut
    channels: list[ModelChannel]
    sample_period_s: float
    window: int
    stride: int
    window_period_s: float
    warning: float
    critical: float
    threshold_method: str
    provisional: str | None = Field(default=None, description="why the thresholds are provisional (too little calibration data), else null")
    alert_rule: RuleTiming
    score_method: str
    onnx_sha256: str
    assets: list[str] = Field(description="assets bound to this model")


class ModelList(BaseModel):
    items: list[ModelOut]
    next_cursor: str | None = None


class ReloadOut(BaseModel):
    served: dict[str, str]
    changed: dict[str, dict[str, str | None]]
    models: list[ModelOut]


# --------------------------------------------------------------------------- alert health


class FigureOut(BaseModel):
    name: str
    value: float | None
    unit: str
    target: float | None
    limit: float | None
    verdict: Literal["within_target", "above_target", "beyond_limit", "no_data"]
    basis: str
    detail: dict[str, Any]


class AlertHealthOut(BaseModel):
    since: UtcOut
    until: UtcOut
    assets: int
    asset_days: float
    alerts_opened: int
    chatter_horizon_s: float
    figures: list[FigureOut]
    caution: str


# --------------------------------------------------------------------------- row -> response


def _seconds(a: datetime, b: datetime) -> float:
    return (b - a).total_seconds()


def alert_out(alert: Any, warning_level: float | None = None) -> AlertOut:
    """An alerts row (service.db.models.Alert) as its response model; `warning_level` is the
    warning level in force when it opened (service.db.alerts.warning_levels)."""
    end = alert.returned_at or alert.last_seen_at
    return AlertOut(
        id=alert.id,
        asset_id=alert.asset_id,
        severity=alert.severity,
        state=alert.state,
        condition=alert.condition,
        opened_at=alert.opened_at,
        last_seen_at=alert.last_seen_at,
        returned_at=alert.returned_at,
        duration_s=max(_seconds(alert.opened_at, end), 0.0),
        peak_score=alert.peak_score,
        peak_at=alert.peak_at,
        warning_level=warning_level,
        peak_ratio=alert.peak_score / warning_level if warning_level else None,
        top_channels=[ChannelShare(channel=c["channel"], share=float(c["share"])) for c in (alert.top_channels or [])],
        model_id=alert.model_id,
        model_version=alert.model_version,
        threshold_version_id=alert.threshold_version_id,
        acknowledged_at=alert.acknowledged_at,
        acknowledged_by=alert.acknowledged_by,
        closed_at=alert.closed_at,
        closed_by=alert.closed_by,
        outcome=alert.outcome,
        close_note=alert.close_note,
        backfilled=bool(getattr(alert, "backfilled", False)),
    )


def threshold_out(version: Any, window_period_s: float | None) -> ThresholdOut:
    """A threshold_versions row as its response model, with the rule's timing in seconds."""
    return ThresholdOut(
        asset_id=version.asset_id,
        version=version.version,
        warning=version.warning,
        critical=version.critical,
        on_k=version.on_k,
        on_n=version.on_n,
        off_m=version.off_m,
        deadband_frac=version.deadband_frac,
        clear_level=version.warning * (1.0 - version.deadband_frac),
        origin=version.origin,
        budget_per_week=version.budget_per_week,
        reason=version.reason,
        created_by=version.created_by,
        created_at=version.created_at,
        model_id=version.model_id,
        model_version=version.model_version,
        window_period_s=window_period_s,
        on_delay_s=version.on_k * window_period_s if window_period_s else None,
        off_delay_s=version.off_m * window_period_s if window_period_s else None,
    )


def rule_out(rule: Any) -> RuleOut:
    return RuleOut(
        warning=rule.warning, critical=rule.critical, on_k=rule.on_k, on_n=rule.on_n, off_m=rule.off_m, deadband_frac=rule.deadband_frac
    )
