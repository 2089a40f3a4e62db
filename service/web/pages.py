"""What each dashboard page shows, assembled from the service's query functions, the pure
retune/alerting modules and the SVG charts. No HTTP here: routes.py renders the result."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from typing import Any
from urllib.parse import urlencode

from sqlalchemy.orm import Session

from service.alerting import AlertRule, rule_of
from service.actions import PREVIEW_DEFAULT, preview_change
from service.db import alerts as alert_q
from service.db import readings as readings_q
from service.db import thresholds as threshold_q
from service.db.models import Alert
from service.errors import KilterError, ModelError, NotFound
from service.models_registry import LoadedModel, ModelRegistry
from service.retune import calibration_set, expected_false_alarms_per_week, levels_for_budget, preview
from service.retune_risk import MIN_HISTORY_DAYS, MIN_RISKY_REASON, RetuneRisk, fmt_days
from service.settings import Settings
from service.web import charts, views
from service.web.access import WebUser

CONTEXT_FACTOR = 1.0  # the alert chart shows this many alert-lengths either side of the alert
MIN_CONTEXT_WINDOWS = 30
TOP_CHANNELS = 3


def loaded_model(registry: ModelRegistry, model_id: str) -> LoadedModel | None:
    try:
        return registry.get(model_id)
    except ModelError:  # the model is no longer served: pages still show what is stored
        return None


def provisional_note(model: LoadedModel | None) -> str | None:
    """Why the served model's levels are provisional (shown beside the model), or None."""
    p = model.manifest.provisional if model is not None else None
    return f"Provisional thresholds: {p.reason}. {p.advice[0].upper() + p.advice[1:]}." if p is not None else None


def units_of(model: LoadedModel | None) -> dict[str, str]:
    return {c.name: c.unit for c in model.manifest.channels} if model else {}


def silent_after(settings: Settings, registry: ModelRegistry) -> dict[str, float]:
    """Seconds without a reading after which an asset counts as silent, per model id."""
    return {m.model_id: settings.silent_after_windows * m.manifest.window_period_s for m in registry.models()}


def fmt_ratio(peak: float, warning: float | None) -> str:
    """The peak as a multiple of the warning level in force: '4.2x warning'."""
    if not warning:
        return ""
    return f"{views.fmt_score(peak / warning)}x warning"


def alert_row(a: Alert, warning: float | None = None) -> dict[str, Any]:
    """One row of the alert list; `warning` is the level in force when it opened."""
    end = a.returned_at or a.last_seen_at
    top = a.top_channels[0]["channel"] if a.top_channels else "–"
    return {
        "id": a.id,
        "asset_id": a.asset_id,
        "severity": a.severity,
        "state": a.state,
        "condition": a.condition,
        "opened": views.fmt_time(a.opened_at),
        "duration": views.fmt_duration((end - a.opened_at).total_seconds()),
        "peak": views.fmt_score(a.peak_score),
        "ratio": fmt_ratio(a.peak_score, warning),
        "top_channel": top,
    }


STATE_PHRASES = {"unacknowledged": "need acknowledging", "acknowledged": "acknowledged", "closed": "closed"}
LIST_ORDER = {
    "priority": "active before returned, unacknowledged before acknowledged, critical before warning, then newest first; closed last",
    "newest": "newest first",
}


def alert_list(
    db: Session, *, user: WebUser, filters: dict[str, str], cursor: str | None, page_size: int, sort: str
) -> dict[str, Any]:
    """The alert list page (and its live fragment): one page of rows in the asked order, the
    counts per state (following the asset filter) as filter links, pager links."""
    flashes: list[tuple[str, str]] = []
    rows: list[Alert] = []
    next_cursor = None
    sort = sort if sort in LIST_ORDER else "priority"
    try:
        rows, next_cursor = alert_q.list_alerts(
            db,
            asset_id=filters["asset"] or None,
            state=filters["state"] or None,
            severity=filters["severity"] or None,
            since=views.parse_utc_local(filters["since"], "Opened from"),
            until=views.parse_utc_local(filters["until"], "Opened before"),
            limit=page_size,
            cursor=cursor or None,
            allowed_assets=user.caller.assets,
            sort=sort,
        )
    except views.FormValueError as e:
        flashes.append(("error", str(e)))
    except KilterError as e:
        flashes.append(("error", e.message))
    scope = user.caller.assets
    if filters["asset"]:  # the tallies follow the asset filter
        scope = frozenset({filters["asset"]}) if scope is None else scope & {filters["asset"]}
    counts = alert_q.count_by_state(db, allowed_assets=scope)
    ids = [a.asset_id for a in readings_q.list_assets(db, now=datetime.now(timezone.utc), silent_after_s={})]
    kept = {k: v for k, v in filters.items() if v}
    if sort != "priority":
        kept["sort"] = sort
    tallies = [
        {
            "state": name,
            "count": counts.get(name, 0),
            "phrase": STATE_PHRASES[name],
            "href": "/alerts?" + urlencode({**{k: v for k, v in kept.items() if k != "state"}, "state": name}),
            "current": filters["state"] == name,
        }
        for name in STATE_PHRASES
    ]
    described = ", ".join(f"{k} {v}" for k, v in kept.items() if k != "sort") or "no filters"
    warnings = alert_q.warning_levels(db, rows)
    return {
        "page_title": "Alerts",
        "section": "alerts",
        "rows": [alert_row(a, warnings.get(a.threshold_version_id or 0)) for a in rows],
        "counts": counts,
        "tallies": tallies,
        "filters": filters,
        "sort": sort,
        "order_text": LIST_ORDER[sort],
        "asset_ids": ids,
        "caption": f"{len(rows)} alert{'' if len(rows) == 1 else 's'} on this page ({described}); {LIST_ORDER[sort]}.",
        "next_href": "/alerts?" + urlencode({**kept, "cursor": next_cursor}) if next_cursor else None,
        "first_href": "/alerts?" + urlencode(kept) if cursor else None,
        "flashes": flashes,
    }


def alert_live(detail: alert_q.AlertDetail, model: LoadedModel | None) -> dict[str, Any]:
    """The parts of the alert page that change while it is open: its facts and history
    (the page and its live refresh both render them)."""
    a, th = detail.alert, detail.threshold
    end = a.returned_at or a.last_seen_at
    length = end - a.opened_at
    warning = th.warning if th else None
    critical = th.critical if th else None
    if warning is None and model is not None:
        warning, critical = model.manifest.thresholds.warning, model.manifest.thresholds.critical
    history = [
        {
            "at": views.fmt_time(e.at),
            "actor": e.actor,
            "kind": e.kind,
            "label": views.EVENT_LABELS.get(e.kind, e.kind)
            + (f" as {views.OUTCOME_LABELS.get((e.details or {}).get('outcome', ''), '')}" if e.kind == "closed" else "")
            + (" (with the close)" if e.kind == "acknowledged" and (e.details or {}).get("implicit") else ""),
            "note": e.note,
        }
        for e in detail.events
    ]
    levels = f"warning {views.fmt_score(warning)}, critical {views.fmt_score(critical)}" + (f" (v{th.version})" if th else "")
    return {
        "a": {
            **alert_row(a, th.warning if th else None),
            "returned": views.fmt_time(a.returned_at),
            "duration": views.fmt_duration(length.total_seconds()) + (" so far" if a.condition == "active" else ""),
            "peak_at": views.fmt_time(a.peak_at) + " UTC",
            "levels": levels,
            "on_delay": f"{th.on_k} of {th.on_n}" if th else "enough",
            "model": f"{a.model_id} / {a.model_version}",
            "model_provisional": provisional_note(model) if model is not None and model.version == a.model_version else None,
            "outcome": a.outcome,
            "outcome_label": views.OUTCOME_LABELS.get(a.outcome or "", a.outcome),
            "close_note": a.close_note,
            "closed": views.fmt_time(a.closed_at),
            "closed_by": a.closed_by,
            "acknowledged": views.fmt_time(a.acknowledged_at),
            "acknowledged_by": a.acknowledged_by,
        },
        "history": history,
    }


def alert_detail(db: Session, registry: ModelRegistry, *, alert_id: int, user: WebUser) -> dict[str, Any]:
    """The alert page: facts, score chart around the alert, contributions at the peak, raw
    readings of the top channels over the same stretch, and the history."""
    detail = alert_q.get_alert(db, alert_id=alert_id, allowed_assets=user.caller.assets)
    a, th = detail.alert, detail.threshold
    model = loaded_model(registry, a.model_id)
    period_s = model.manifest.window_period_s if model else 60.0
    end = a.returned_at or a.last_seen_at
    length = end - a.opened_at
    pad = max(length * CONTEXT_FACTOR, timedelta(seconds=period_s * MIN_CONTEXT_WINDOWS))
    since, until = a.opened_at - pad, end + pad
    series = threshold_q.score_series(db, asset_id=a.asset_id, model_id=a.model_id, since=since, until=until + timedelta(milliseconds=1))
    warning = th.warning if th else None
    critical = th.critical if th else None
    if warning is None and model is not None:
        warning, critical = model.manifest.thresholds.warning, model.manifest.thresholds.critical
    opened_ms, end_ms = alert_q.to_ms(a.opened_at), alert_q.to_ms(end)
    t_range = (alert_q.to_ms(since), alert_q.to_ms(until))
    score_svg = charts.score_chart(
        t_ms=[int(t) for t in series.window_end_ms],
        scores=[float(s) for s in series.score],
        warning=float(warning or 1.0),
        critical=float(critical or warning or 1.0),
        highlight=charts.Span(opened_ms, end_ms, "alert", f"alert #{a.id}: {views.fmt_time(a.opened_at)} to {views.fmt_time(end)} UTC"),
        t_range=t_range,
        title=f"Window score of {a.asset_id} around alert #{a.id}",
    )
    peak_points = readings_q.asset_scores(db, asset_id=a.asset_id, since=a.peak_at, until=a.peak_at + timedelta(milliseconds=1), limit=5)
    peak_points = [p for p in peak_points if p.model_id == a.model_id] or peak_points
    if peak_points:
        shares = sorted(peak_points[-1].contributions.items(), key=lambda kv: -float(kv[1]))
    else:
        shares = [(c["channel"], c["share"]) for c in a.top_channels]
    units = units_of(model)
    bars_svg = charts.contribution_bars(
        shares=[(f"{name} ({units[name]})" if name in units else name, float(share)) for name, share in shares],
        title=f"Channel shares of the residual at the peak of alert #{a.id}",
    )
    top = [name for name, _ in shares[:TOP_CHANNELS]]
    raw = readings_q.readings_between(db, asset_id=a.asset_id, start_ms=t_range[0], end_ms=t_range[1] + 1, limit=20_000)
    traces = [
        charts.Trace(
            name=name,
            unit=units.get(name, "unit unknown"),
            t_ms=[t for t, _ in raw],
            values=[(float(v[name]) if v.get(name) is not None else None) for _, v in raw],
        )
        for name in top
    ]
    readings_svg = charts.readings_chart(
        traces=traces,
        highlight=charts.Span(opened_ms, end_ms, "alert"),
        t_range=t_range,
        title=f"Raw readings of {', '.join(top) or 'the top channels'} on {a.asset_id}",
    )
    return {
        "page_title": f"Alert #{a.id}",
        "section": "alerts",
        **alert_live(detail, model),
        "score_svg": score_svg,
        "bars_svg": bars_svg,
        "readings_svg": readings_svg,
        "outcomes": list(views.OUTCOME_LABELS.items()),
        "can_tune": user.can("operator"),
        "back_href": "/alerts?" + urlencode({"asset": a.asset_id}),
    }


def month_note(per_month: float) -> str:
    short = views.fmt_rate_short(per_month)
    return f"under {short[2:]} a month" if short.startswith("<") else f"about {short} a month"


def risk_view(risk: RetuneRisk, past: list[Any]) -> dict[str, Any]:
    """What the preview shows about a proposal's risks, and what Apply must then confirm."""
    opened = {p.alert_id: views.fmt_ms(p.start_ms) for p in past}
    return {
        "statements": risk.statements(),
        "change_note": risk.change_note(),
        "needs_confirmation": bool(risk.needs_confirmation),
        "missed": [{"id": i, "opened": opened.get(i, "–")} for i in risk.missed_ids],
        "short_history": risk.short_history,
        "history": fmt_days(risk.history_days),
        "min_history": fmt_days(MIN_HISTORY_DAYS),
        "min_reason": MIN_RISKY_REASON if risk.needs_confirmation else 3,
    }


@dataclass
class ThresholdInputs:
    """The threshold form as typed: by value (warning, critical) or by budget."""

    by: str
    warning: str
    critical: str
    budget: str


def proposed_rule(current: AlertRule, inputs: ThresholdInputs, cal: Any) -> tuple[AlertRule, float | None, str]:
    """(rule, budget_per_week or None, origin) from the form; FormValueError names the field."""
    if inputs.by == "budget":
        budget = views.parse_positive(inputs.budget, "False alarms per week", required=True)
        assert budget is not None
        if cal is None:
            raise views.FormValueError("False alarms per week: this model ships no calibration scores, so set a value instead")
        try:
            levels = levels_for_budget(cal, current, budget)
        except ValueError as e:
            raise views.FormValueError(f"False alarms per week: {e}") from None
        return current.with_thresholds(levels.warning, levels.critical), budget, "budget"
    warning = views.parse_positive(inputs.warning, "Warning level", required=True)
    critical = views.parse_positive(inputs.critical, "Critical level", required=False)
    assert warning is not None
    if critical is not None and critical < warning:
        raise views.FormValueError(f"Critical level: {views.fmt_score(critical)} is below the warning level {views.fmt_score(warning)}")
    try:
        return current.with_thresholds(warning, critical), None, "manual"
    except ValueError as e:
        raise views.FormValueError(str(e)) from None


def calibration_of(model: LoadedModel | None) -> Any:
    if model is None:
        return None
    try:
        return calibration_set(model.calibration, model.manifest)
    except ValueError:
        return None


def _lane_kind(outcome: str | None) -> str:
    return outcome if outcome in views.OUTCOME_LABELS else "open"


def threshold_page(
    db: Session, registry: ModelRegistry, settings: Settings, *, asset_id: str, inputs: ThresholdInputs | None
) -> dict[str, Any]:
    """The threshold page: settings in force, score history with recorded alerts and, given
    inputs, the proposal replayed over the same stored scores (as the preview endpoint does)."""
    asset = threshold_q.get_asset(db, asset_id=asset_id)
    cur = threshold_q.threshold_in_force(db, asset_id=asset_id)
    if cur is None:
        raise NotFound(f"asset {asset_id!r} has no threshold version yet: it gets one with its first readings")
    model = loaded_model(registry, asset.model_id)
    cal = calibration_of(model)
    current_rule = rule_of(cur)
    now = datetime.now(timezone.utc)
    last_ms = asset.last_window_end_ms
    # The same stretch the preview endpoint replays by default: up to the newest stored window.
    until = alert_q.just_after(last_ms) if last_ms is not None else now
    since = until - PREVIEW_DEFAULT
    series = threshold_q.score_series(db, asset_id=asset_id, model_id=asset.model_id, since=since, until=until)
    past = threshold_q.past_alerts(db, asset_id=asset_id, since=since, until=until)
    t_ms = [int(t) for t in series.window_end_ms]
    t_range = (t_ms[0], t_ms[-1]) if t_ms else None

    lanes = [
        charts.Lane(
            "recorded",
            [
                charts.Span(p.start_ms, p.end_ms, _lane_kind(p.outcome), f"alert #{p.alert_id}: {views.OUTCOME_LABELS.get(p.outcome or '', 'not closed')}")
                for p in past
            ],
        )
    ]
    pv_view = None
    overlay = None
    form_error = None
    if inputs is not None:
        try:
            rule, budget, _origin = proposed_rule(current_rule, inputs, cal)
            risk = None
            if model is not None:  # the check Apply runs (service/api/thresholds.py), on the same stretch
                done = preview_change(db, asset=asset, model=model, current=current_rule, proposed=rule, since=since, until=until)
                result, risk = done.result, done.risk
            else:
                result = preview(series, rule, current_rule, past, cal)
            lanes.append(
                charts.Lane(
                    "would open",
                    [charts.Span(p.start_ms, p.end_ms, "proposed", f"{p.severity}, peak {views.fmt_score(p.peak)}") for p in result.proposed],
                    kind="proposed",
                )
            )
            overlay = charts.Preview(rule.warning, rule.critical)
            confirmed_total = sum(1 for p in past if p.outcome == "confirmed_fault")
            pv_view = {
                "warning": views.fmt_score(rule.warning),
                "critical": views.fmt_score(rule.critical),
                "warning_raw": repr(rule.warning),
                "critical_raw": repr(rule.critical),
                "budget": views.fmt_score(budget) if budget else None,
                "budget_raw": repr(budget) if budget else "",
                "windows": result.windows,
                "range": f"from {views.fmt_ms(result.first_window_end_ms)} to {views.fmt_ms(result.last_window_end_ms)} UTC" if result.windows else "",
                "would_open": len(result.proposed),
                "current_open": len(result.current),
                "overlap_confirmed": result.overlap_confirmed_fault,
                "overlap_false": result.overlap_false_alarm,
                "expected": views.fmt_rate_short(result.expected_false_alarms_per_week),
                "expected_note": (
                    f"{month_note(result.expected_false_alarms_per_week * 30.44 / 7)} "
                    if result.expected_false_alarms_per_week
                    else ""
                ),
                "current_expected": views.fmt_rate_short(result.current_expected_false_alarms_per_week),
                "missed_confirmed": (
                    f"{confirmed_total - result.overlap_confirmed_fault} of the {confirmed_total} confirmed faults in this stretch "
                    "would have raised no alert at these levels."
                    if risk is None and result.overlap_confirmed_fault < confirmed_total
                    else ""
                ),
                "risk": risk_view(risk, past) if risk is not None else None,
            }
        except views.FormValueError as e:
            form_error = str(e)

    score_svg = charts.score_chart(
        t_ms=t_ms,
        scores=[float(s) for s in series.score],
        warning=current_rule.warning,
        critical=current_rule.critical,
        lanes=lanes,
        preview=overlay,
        t_range=t_range,
        title=f"Window score history of {asset_id}" + (" with the proposed levels" if overlay else ""),
        height=340,
    )
    current_expected = expected_false_alarms_per_week(cal, current_rule, current_rule.warning) if cal is not None else None
    versions = threshold_q.threshold_history(db, asset_id=asset_id)
    shelved = None
    if threshold_q.is_shelved(asset, now):
        shelved = {"until": views.fmt_time(asset.shelved_until) + " UTC", "by": asset.shelved_by, "reason": asset.shelve_reason}
    state_name = readings_q.derive_state(
        shelved_until=asset.shelved_until,
        alerting=readings_q.active_alert(db, asset_id=asset_id) is not None,
        last_reading_at=asset.last_reading_at,
        now=now,
        silent_after_s=silent_after(settings, registry).get(asset.model_id, 1800.0),
    )
    form = inputs or ThresholdInputs("level", "", "", "")
    return {
        "page_title": f"Thresholds · {asset_id}",
        "section": "assets",
        "asset_id": asset_id,
        "asset_state_name": state_name,
        "cur": {
            "version": cur.version,
            "warning": views.fmt_score(cur.warning),
            "critical": views.fmt_score(cur.critical),
            "on_k": cur.on_k,
            "on_n": cur.on_n,
            "off_m": cur.off_m,
            "clear_level": views.fmt_score(current_rule.clear_level),
            "created_by": cur.created_by,
            "origin": cur.origin,
            "created_at": views.fmt_time(cur.created_at) + " UTC",
            "expected": views.fmt_rate(current_expected),
        },
        "range_label": f"(up to {PREVIEW_DEFAULT.days} days of stored windows, UTC)" if t_ms else "",
        "score_svg": score_svg,
        "pv": pv_view,
        "form": form,
        "form_error": form_error,
        "versions": [
            {
                "version": v.version,
                "in_force": v.version == cur.version,
                "warning": views.fmt_score(v.warning),
                "critical": views.fmt_score(v.critical),
                "origin": v.origin,
                "budget": views.fmt_score(v.budget_per_week) if v.budget_per_week else None,
                "created_by": v.created_by,
                "created_at": views.fmt_time(v.created_at),
                "reason": v.reason,
            }
            for v in versions
        ],
        "shelved": shelved,
    }


VERDICT_LABELS = {"within_target": "within target", "above_target": "above target", "beyond_limit": "beyond limit", "no_data": "no data"}


def _figure_number(v: float | None, unit: str) -> str:
    """A figure's number; fractions as percentages."""
    if v is None:
        return "–"
    if unit.startswith("fraction"):
        return f"{views.fmt_score(v * 100)} %"
    return views.fmt_score(v)


def alert_health_page(db: Session, registry: ModelRegistry) -> dict[str, Any]:
    """The alert-health figures of GET /v1/alert-health, for people."""
    from service.api.alerts import health_report

    h = health_report(db, registry, since=None, until=None)
    return {
        "page_title": "Alert health",
        "section": "health",
        "h": h,
        "span": f"from {views.fmt_time(h.since)} to {views.fmt_time(h.until)}",
        "asset_days": views.fmt_score(h.asset_days),
        "horizon": views.fmt_duration(h.chatter_horizon_s),
        "figures": [
            {
                "name": f.name,
                "label": f.name.replace("_", " "),
                "unit": f.unit,
                "value": _figure_number(f.value, f.unit),
                "target": _figure_number(f.target, f.unit),
                "limit": _figure_number(f.limit, f.unit),
                "verdict": f.verdict,
                "verdict_label": VERDICT_LABELS.get(f.verdict, f.verdict),
                "basis": f.basis,
            }
            for f in h.figures
        ],
    }


def notify_page(db: Session) -> dict[str, Any]:
    """Routes and the newest outbox messages, for admins."""
    from service.db import outbox

    return {
        "page_title": "Notifications",
        "section": "notify",
        "routes": outbox.list_routes(db),
        "outbox": [
            {"kind": m.kind, "key": m.idempotency_key, "status": m.status, "attempts": m.attempts, "last_error": m.last_error}
            for m in outbox.list_outbox(db, limit=20)
        ],
    }
