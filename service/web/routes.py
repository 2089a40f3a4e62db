"""The dashboard's pages (server-rendered, Jinja2 with autoescape) and their form posts.

Built on the service's own query functions (service/db/) and pure modules
(service/retune.py, service/alerting.py); the pages compute nothing the API does not.

Access: a signed session cookie (service/web/session.py) names the API key that signed
in; each request looks the key up again and takes its role from the database. Pages
need maintenance or above; the threshold editor, shelving and rollback need operator.
Every post carries the CSRF token of its session, and a post whose Origin header names
another site is refused as well.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import Annotated, Any
from urllib.parse import urlencode, urlsplit

from fastapi import APIRouter, Form, Query, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from jinja2 import Environment, FileSystemLoader, select_autoescape
from pydantic import ValidationError
from sqlalchemy.orm import Session

from service.alerting import AlertRule
from service.api.deps import PEOPLE_RANK, Caller
from service.api.thresholds import PREVIEW_DEFAULT
from service.db import alerts as alert_q
from service.db import readings as readings_q
from service.db import thresholds as threshold_q
from service.db.keys import find_key
from service.db.session import sqlite_file
from service.errors import Conflict, EchowatchError, NotFound
from service.models_registry import LoadedModel
from service.retune import calibration_set, expected_false_alarms_per_week, levels_for_budget, preview
from service.web import charts, views
from service.web.queries import key_by_id
from service.web.session import (
    CSRF_FIELD,
    DEFAULT_MAX_AGE_S,
    SESSION_COOKIE,
    SIGNIN_COOKIE,
    SIGNIN_MAX_AGE_S,
    SessionCodec,
    WebSession,
    cookie_options,
    resolve_secret,
)

TEMPLATE_DIR = Path(__file__).parent / "templates"
PAGE_SIZE = 25
CONTEXT_FACTOR = 1.0  # the alert chart shows this many alert-lengths either side of the alert
MIN_CONTEXT_WINDOWS = 30
TOP_CHANNELS = 3

router = APIRouter(include_in_schema=False)

_env = Environment(loader=FileSystemLoader(TEMPLATE_DIR), autoescape=select_autoescape(default=True, default_for_string=True))

DONE_MESSAGES = {
    "acknowledged": "Alert acknowledged.",
    "closed": "Alert closed.",
    "noted": "Note added.",
    "applied": "New threshold version applied.",
    "rolled_back": "Rolled back: the old settings are in force again as a new version.",
    "shelved": "Asset shelved: no new alerts open until the time shown.",
    "unshelved": "Asset unshelved: alerts open again as the rule decides.",
    "signed_out": "You are signed out.",
}


# --------------------------------------------------------------------------- plumbing


def _codec(request: Request) -> SessionCodec:
    """One codec per app; its secret comes from resolve_secret (settings, or a file beside
    the SQLite database shared by all worker processes)."""
    state = request.app.state
    codec = getattr(state, "web_codec", None)
    if codec is None:
        settings = state.settings
        configured = settings.session_secret.get_secret_value() if settings.session_secret is not None else None
        db_file = sqlite_file(settings.database_url)
        codec = SessionCodec(resolve_secret(configured, db_file.parent if db_file else None), max_age_s=DEFAULT_MAX_AGE_S)
        state.web_codec = codec
    return codec


@dataclass(frozen=True)
class WebUser:
    caller: Caller
    session: WebSession
    csrf_token: str

    @property
    def name(self) -> str:
        return self.caller.name

    @property
    def role(self) -> str:
        return self.caller.role

    def can(self, role: str) -> bool:
        return self.caller.has_role(role)


def _read_session(request: Request) -> Session:
    return request.app.state.db.session()


@contextmanager
def _write(request: Request) -> Iterator[Session]:
    with request.app.state.db.transaction() as session:
        yield session


def _current_user(request: Request) -> WebUser | None:
    codec = _codec(request)
    web_session = codec.read(request.cookies.get(SESSION_COOKIE))
    if web_session is None:
        return None
    with _read_session(request) as db:
        row = key_by_id(db, key_id=web_session.key_id)
        if row is None or row.role not in PEOPLE_RANK:
            return None
        caller = Caller(row.id, row.name, row.role, frozenset(row.assets) if row.assets is not None else None)
    return WebUser(caller, web_session, codec.csrf_token(web_session))


def _static_url(name: str) -> str:
    return f"/static/{name}"


def _render(request: Request, template: str, context: dict[str, Any], *, user: WebUser | None, status: int = 200) -> HTMLResponse:
    done = request.query_params.get("done")
    flashes = list(context.pop("flashes", []))
    if done in DONE_MESSAGES:
        flashes.insert(0, ("ok", DONE_MESSAGES[done]))
    page = _env.get_template(template).render(
        request=request,
        user=user,
        csrf_token=user.csrf_token if user else "",
        flashes=flashes,
        static=_static_url,
        **context,
    )
    response = HTMLResponse(page, status_code=status)
    response.headers["Cache-Control"] = "no-store"
    response.headers["X-Frame-Options"] = "DENY"
    response.headers["Content-Security-Policy"] = (
        "default-src 'self'; img-src 'self' data:; style-src 'self' 'unsafe-inline'; script-src 'self'; "
        "frame-ancestors 'none'; form-action 'self'; base-uri 'none'"
    )
    response.headers["Referrer-Policy"] = "same-origin"
    return response


def _error_page(request: Request, user: WebUser | None, status: int, heading: str, message: str, back: str | None = None) -> HTMLResponse:
    return _render(
        request,
        "error.html",
        {"page_title": heading, "heading": heading, "message": message, "back_href": back or "/alerts", "section": ""},
        user=user,
        status=status,
    )


def _to_signin(request: Request) -> RedirectResponse:
    target = request.url.path + (f"?{request.url.query}" if request.url.query else "")
    return RedirectResponse(f"/signin?{urlencode({'next': target})}", status_code=303)


def _forbidden(request: Request, user: WebUser, needed: str) -> HTMLResponse:
    return _error_page(
        request,
        user,
        403,
        "Not available with your key",
        f"This page needs an {needed} key; you signed in with a {user.role} key ({user.name}). Ask an operator to make the change.",
    )


def _same_origin(request: Request) -> bool:
    origin = request.headers.get("origin")
    if not origin or origin == "null":
        return origin is None
    return urlsplit(origin).netloc == request.headers.get("host", "")


Guarded = tuple[WebUser | None, Response | None]


def _guard(request: Request, *, role: str = "maintenance", csrf: str | None = None, posting: bool = False) -> Guarded:
    """(user, None) when the request may go on, else (user or None, the response to send)."""
    user = _current_user(request)
    if user is None:
        if posting:
            return None, _error_page(request, None, 401, "Signed out", "Your session has ended. Sign in again and repeat the change.", "/signin")
        return None, _to_signin(request)
    if not user.can(role):
        return user, _forbidden(request, user, role)
    if posting:
        codec = _codec(request)
        if not _same_origin(request) or not codec.csrf_ok(user.session, csrf):
            return user, _error_page(
                request,
                user,
                403,
                "Form refused",
                "This form did not carry a valid token from this dashboard (it may be from an old page, or from another site). "
                "Reload the page and try again.",
            )
    return user, None


def _after_post(path: str, done: str, anchor: str = "") -> RedirectResponse:
    sep = "&" if "?" in path else "?"
    return RedirectResponse(f"{path}{sep}done={done}{anchor}", status_code=303)


def _failed(request: Request, user: WebUser | None, e: EchowatchError, back: str) -> HTMLResponse:
    heading = {404: "Not found", 409: "Already changed", 422: "Cannot use that input"}.get(e.status, "Could not do that")
    return _error_page(request, user, e.status, heading, e.message, back)


def _loaded_model(request: Request, model_id: str) -> LoadedModel | None:
    try:
        return request.app.state.registry.get(model_id)
    except Exception:  # the model is no longer served: pages still show what is stored
        return None


def _units(model: LoadedModel | None) -> dict[str, str]:
    return {c.name: c.unit for c in model.manifest.channels} if model else {}


# --------------------------------------------------------------------------- sign-in


@router.get("/", response_class=HTMLResponse)
def home(request: Request) -> Response:
    return RedirectResponse("/alerts", status_code=303)


def _safe_next(target: str | None) -> str:
    if not target or not target.startswith("/") or target.startswith("//") or "\\" in target:
        return "/alerts"
    return target


def _signin_page(request: Request, *, error: str | None = None, status: int = 200, next_path: str = "/alerts") -> HTMLResponse:
    codec = _codec(request)
    nonce = codec.new_signin_nonce()
    response = _render(
        request,
        "signin.html",
        {
            "page_title": "Sign in",
            "section": "",
            "error": error,
            "signin_token": codec.signin_token(nonce),
            "next": _safe_next(next_path),
            "session_hours": DEFAULT_MAX_AGE_S // 3600,
        },
        user=None,
        status=status,
    )
    response.set_cookie(SIGNIN_COOKIE, nonce, **cookie_options(secure=request.url.scheme == "https", max_age_s=SIGNIN_MAX_AGE_S))
    return response


@router.get("/signin", response_class=HTMLResponse)
def signin_form(request: Request, next: Annotated[str | None, Query(max_length=500)] = None) -> Response:
    if _current_user(request) is not None:
        return RedirectResponse(_safe_next(next), status_code=303)
    return _signin_page(request, next_path=next or "/alerts")


@router.post("/signin", response_class=HTMLResponse)
def signin(
    request: Request,
    api_key: Annotated[str, Form(max_length=200)] = "",
    signin_token: Annotated[str, Form(max_length=200)] = "",
    next: Annotated[str, Form(max_length=500)] = "/alerts",
) -> Response:
    codec = _codec(request)
    if not _same_origin(request) or not codec.signin_ok(request.cookies.get(SIGNIN_COOKIE), signin_token):
        return _signin_page(request, error="The sign-in form had expired. Enter your key again.", status=403, next_path=next)
    key = api_key.strip()
    if not key:
        return _signin_page(request, error="Enter your API key.", status=422, next_path=next)
    with _read_session(request) as db:
        row = find_key(db, key=key)
        if row is None:
            return _signin_page(request, error="That key is unknown or revoked.", status=401, next_path=next)
        if row.role not in PEOPLE_RANK:
            return _signin_page(
                request,
                error=f"That is a {row.role} key, for machines posting readings. Sign in with a maintenance, operator or admin key.",
                status=403,
                next_path=next,
            )
        key_id = row.id
    cookie, _ = codec.issue(key_id)
    response = RedirectResponse(_safe_next(next), status_code=303)
    secure = request.url.scheme == "https"
    response.set_cookie(SESSION_COOKIE, cookie, **cookie_options(secure=secure, max_age_s=codec.max_age_s))
    response.delete_cookie(SIGNIN_COOKIE, path="/", httponly=True, samesite="strict", secure=secure)
    return response


@router.post("/signout", response_class=HTMLResponse)
def signout(request: Request, csrf_token: Annotated[str | None, Form(alias=CSRF_FIELD)] = None) -> Response:
    user, refused = _guard(request, csrf=csrf_token, posting=True)
    if refused is not None and user is not None:
        return refused
    response = RedirectResponse("/signin?done=signed_out", status_code=303)
    response.delete_cookie(SESSION_COOKIE, path="/", httponly=True, samesite="strict", secure=request.url.scheme == "https")
    return response


# --------------------------------------------------------------------------- alerts


def _alert_row(a: Any) -> dict[str, Any]:
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
        "top_channel": top,
    }


@router.get("/alerts", response_class=HTMLResponse)
def alerts_page(
    request: Request,
    asset: Annotated[str | None, Query(max_length=64)] = None,
    state: Annotated[str | None, Query(max_length=32)] = None,
    severity: Annotated[str | None, Query(max_length=32)] = None,
    since: Annotated[str | None, Query(max_length=40)] = None,
    until: Annotated[str | None, Query(max_length=40)] = None,
    cursor: Annotated[str | None, Query(max_length=200)] = None,
) -> Response:
    user, refused = _guard(request)
    if refused is not None or user is None:
        return refused  # type: ignore[return-value]
    filters = {"asset": asset or "", "state": state or "", "severity": severity or "", "since": since or "", "until": until or ""}
    flashes: list[tuple[str, str]] = []
    rows: list[Any] = []
    next_cursor = None
    with _read_session(request) as db:
        try:
            since_dt = views.parse_utc_local(since, "Opened from")
            until_dt = views.parse_utc_local(until, "Opened before")
            rows, next_cursor = alert_q.list_alerts(
                db,
                asset_id=asset or None,
                state=state or None,
                severity=severity or None,
                since=since_dt,
                until=until_dt,
                limit=PAGE_SIZE,
                cursor=cursor or None,
                allowed_assets=user.caller.assets,
            )
        except views.FormValueError as e:
            flashes.append(("error", str(e)))
        except EchowatchError as e:
            flashes.append(("error", e.message))
        scope = user.caller.assets
        if asset:  # the tallies follow the asset filter
            scope = frozenset({asset}) if scope is None else scope & {asset}
        counts = alert_q.count_by_state(db, allowed_assets=scope)
        ids = [a.asset_id for a in readings_q.list_assets(db, now=datetime.now(timezone.utc), silent_after_s={})]
    kept = {k: v for k, v in filters.items() if v}
    tally_hrefs = {s: "/alerts?" + urlencode({**{k: v for k, v in kept.items() if k != "state"}, "state": s}) for s in counts}
    described = ", ".join(f"{k} {v}" for k, v in kept.items()) or "no filters"
    return _render(
        request,
        "alerts.html",
        {
            "page_title": "Alerts",
            "section": "alerts",
            "rows": [_alert_row(a) for a in rows],
            "counts": counts,
            "tally_hrefs": tally_hrefs,
            "filters": filters,
            "asset_ids": ids,
            "caption": f"{len(rows)} alert{'' if len(rows) == 1 else 's'} on this page ({described}); newest first.",
            "next_href": "/alerts?" + urlencode({**kept, "cursor": next_cursor}) if next_cursor else None,
            "first_href": "/alerts?" + urlencode(kept) if cursor else None,
            "flashes": flashes,
        },
        user=user,
    )


def _detail_context(request: Request, db: Session, alert_id: int, user: WebUser) -> dict[str, Any]:
    detail = alert_q.get_alert(db, alert_id=alert_id, allowed_assets=user.caller.assets)
    a, th = detail.alert, detail.threshold
    model = _loaded_model(request, a.model_id)
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
    units = _units(model)
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
        "page_title": f"Alert #{a.id}",
        "section": "alerts",
        "a": {
            "id": a.id,
            "asset_id": a.asset_id,
            "severity": a.severity,
            "state": a.state,
            "condition": a.condition,
            "opened": views.fmt_time(a.opened_at),
            "returned": views.fmt_time(a.returned_at),
            "duration": views.fmt_duration(length.total_seconds()) + (" so far" if a.condition == "active" else ""),
            "peak": views.fmt_score(a.peak_score),
            "peak_at": views.fmt_time(a.peak_at) + " UTC",
            "levels": levels,
            "on_delay": f"{th.on_k} of {th.on_n}" if th else "enough",
            "model": f"{a.model_id} / {a.model_version}",
            "outcome": a.outcome,
            "outcome_label": views.OUTCOME_LABELS.get(a.outcome or "", a.outcome),
            "close_note": a.close_note,
            "closed": views.fmt_time(a.closed_at),
            "closed_by": a.closed_by,
            "acknowledged": views.fmt_time(a.acknowledged_at),
            "acknowledged_by": a.acknowledged_by,
        },
        "score_svg": score_svg,
        "bars_svg": bars_svg,
        "readings_svg": readings_svg,
        "history": history,
        "outcomes": list(views.OUTCOME_LABELS.items()),
        "can_tune": user.can("operator"),
        "back_href": "/alerts?" + urlencode({"asset": a.asset_id}),
    }


@router.get("/alerts/{alert_id}", response_class=HTMLResponse)
def alert_page(request: Request, alert_id: int) -> Response:
    user, refused = _guard(request)
    if refused is not None or user is None:
        return refused  # type: ignore[return-value]
    with _read_session(request) as db:
        try:
            context = _detail_context(request, db, alert_id, user)
        except EchowatchError as e:
            return _failed(request, user, e, "/alerts")
    return _render(request, "alert_detail.html", context, user=user)


def _alert_action(
    request: Request, alert_id: int, csrf: str | None, done: str, act: Callable[[Session, WebUser], object]
) -> Response:
    user, refused = _guard(request, csrf=csrf, posting=True)
    if refused is not None or user is None:
        return refused  # type: ignore[return-value]
    back = f"/alerts/{alert_id}"
    try:
        with _write(request) as db:
            # The same asset limits as reading the alert.
            alert_q.get_alert(db, alert_id=alert_id, allowed_assets=user.caller.assets)
            act(db, user)
    except EchowatchError as e:
        return _failed(request, user, e, back)
    return _after_post(back, done)


def _note(text: str | None) -> str | None:
    text = (text or "").strip()
    return text or None


@router.post("/alerts/{alert_id}/acknowledge", response_class=HTMLResponse)
def acknowledge(
    request: Request,
    alert_id: int,
    note: Annotated[str | None, Form(max_length=4000)] = None,
    csrf_token: Annotated[str | None, Form(alias=CSRF_FIELD)] = None,
) -> Response:
    return _alert_action(
        request, alert_id, csrf_token, "acknowledged",
        lambda db, u: alert_q.acknowledge(db, alert_id=alert_id, actor=u.name, note=_note(note)),
    )


@router.post("/alerts/{alert_id}/close", response_class=HTMLResponse)
def close(
    request: Request,
    alert_id: int,
    outcome: Annotated[str, Form(max_length=32)] = "",
    note: Annotated[str | None, Form(max_length=4000)] = None,
    csrf_token: Annotated[str | None, Form(alias=CSRF_FIELD)] = None,
) -> Response:
    return _alert_action(
        request, alert_id, csrf_token, "closed",
        lambda db, u: alert_q.close(db, alert_id=alert_id, actor=u.name, outcome=outcome, note=_note(note)),
    )


@router.post("/alerts/{alert_id}/note", response_class=HTMLResponse)
def add_note(
    request: Request,
    alert_id: int,
    note: Annotated[str, Form(max_length=4000)] = "",
    csrf_token: Annotated[str | None, Form(alias=CSRF_FIELD)] = None,
) -> Response:
    return _alert_action(
        request, alert_id, csrf_token, "noted",
        lambda db, u: alert_q.add_note(db, alert_id=alert_id, actor=u.name, note=note),
    )


# --------------------------------------------------------------------------- assets


def _silent_after(request: Request) -> dict[str, float]:
    settings = request.app.state.settings
    return {m.model_id: settings.silent_after_windows * m.manifest.window_period_s for m in request.app.state.registry.models()}


@router.get("/assets", response_class=HTMLResponse)
def assets_page(request: Request) -> Response:
    user, refused = _guard(request)
    if refused is not None or user is None:
        return refused  # type: ignore[return-value]
    now = datetime.now(timezone.utc)
    silent_after = _silent_after(request)
    with _read_session(request) as db:
        summaries = readings_q.list_assets(db, now=now, silent_after_s=silent_after)
    rows = []
    for s in summaries:
        if user.caller.assets is not None and s.asset_id not in user.caller.assets:
            continue
        ratio = (s.last_score / s.warning) if (s.last_score is not None and s.warning) else None
        rows.append(
            {
                "asset_id": s.asset_id,
                "state": s.state,
                "shelved_note": (
                    f"until {views.fmt_time(s.shelved_until)}: {s.shelve_reason}" if s.state == "shelved" else ""
                ),
                "last_reading": views.fmt_time(s.last_reading_at),
                "last_reading_ago": views.fmt_ago(s.last_reading_at, now),
                "score": views.fmt_score(s.last_score) if s.last_score is not None else None,
                "warning": views.fmt_score(s.warning),
                "over": ratio is not None and ratio >= 1,
                "meter_pct": min(100, round(100 * (ratio or 0) / 2)),  # full bar = twice the warning level
                "model": s.model_id,
                "alert_id": s.active_alert_id,
                "alert_severity": s.active_severity,
            }
        )
    periods = sorted(set(silent_after.values()))
    silent_text = views.fmt_duration(periods[0]) if len(periods) == 1 else "a few window periods"
    return _render(
        request,
        "assets.html",
        {"page_title": "Assets", "section": "assets", "rows": rows, "can_tune": user.can("operator"), "silent_after": silent_text},
        user=user,
    )


# --------------------------------------------------------------------------- thresholds


@dataclass
class _ThresholdInputs:
    by: str
    warning: str
    critical: str
    budget: str


def _proposed_rule(current: AlertRule, inputs: _ThresholdInputs, cal: Any) -> tuple[AlertRule, float | None, str]:
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


def _calibration(model: LoadedModel | None) -> Any:
    if model is None:
        return None
    try:
        return calibration_set(model.calibration, model.manifest)
    except ValueError:
        return None


def _lane_kind(outcome: str | None) -> str:
    return outcome if outcome in views.OUTCOME_LABELS else "open"


def _threshold_context(request: Request, db: Session, asset_id: str, user: WebUser, inputs: _ThresholdInputs | None) -> dict[str, Any]:
    asset = threshold_q.get_asset(db, asset_id=asset_id)
    cur = threshold_q.threshold_in_force(db, asset_id=asset_id)
    if cur is None:
        raise NotFound(f"asset {asset_id!r} has no threshold version yet: it gets one with its first readings")
    model = _loaded_model(request, asset.model_id)
    cal = _calibration(model)
    current_rule = threshold_q.rule_of(cur)
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
            rule, budget, _origin = _proposed_rule(current_rule, inputs, cal)
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
                    f"about {views.fmt_score(result.expected_false_alarms_per_week * 30.44 / 7)} a month "
                    if result.expected_false_alarms_per_week
                    else ""
                ),
                "current_expected": views.fmt_rate_short(result.current_expected_false_alarms_per_week),
                "missed_confirmed": (
                    f"{confirmed_total - result.overlap_confirmed_fault} of the {confirmed_total} confirmed faults in this stretch "
                    "would have raised no alert at these levels."
                    if result.overlap_confirmed_fault < confirmed_total
                    else ""
                ),
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
        silent_after_s=_silent_after(request).get(asset.model_id, 1800.0),
    )
    form = inputs or _ThresholdInputs("level", "", "", "")
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


@router.get("/assets/{asset_id}/thresholds", response_class=HTMLResponse)
def thresholds_page(
    request: Request,
    asset_id: str,
    by: Annotated[str | None, Query(max_length=16)] = None,
    warning: Annotated[str | None, Query(max_length=40)] = None,
    critical: Annotated[str | None, Query(max_length=40)] = None,
    budget: Annotated[str | None, Query(max_length=40)] = None,
) -> Response:
    user, refused = _guard(request, role="operator")
    if refused is not None or user is None:
        return refused  # type: ignore[return-value]
    inputs = None
    if by is not None:
        inputs = _ThresholdInputs("budget" if by == "budget" else "level", warning or "", critical or "", budget or "")
    with _read_session(request) as db:
        try:
            context = _threshold_context(request, db, asset_id, user, inputs)
        except EchowatchError as e:
            return _failed(request, user, e, "/assets")
    return _render(request, "thresholds.html", context, user=user)


def _asset_action(request: Request, asset_id: str, csrf: str | None, done: str, act: Callable[[Session, WebUser, Any], object]) -> Response:
    user, refused = _guard(request, role="operator", csrf=csrf, posting=True)
    if refused is not None or user is None:
        return refused  # type: ignore[return-value]
    back = f"/assets/{asset_id}/thresholds"
    try:
        with _write(request) as db:
            asset = threshold_q.get_asset(db, asset_id=asset_id)
            act(db, user, asset)
    except views.FormValueError as e:
        return _error_page(request, user, 422, "Cannot use that input", str(e), back)
    except EchowatchError as e:
        return _failed(request, user, e, back)
    except ValidationError as e:
        return _error_page(request, user, 422, "Cannot use that input", str(e.errors()[0].get("msg", e)), back)
    return _after_post(back, done)


def _reason(text: str | None) -> str:
    reason = (text or "").strip()
    if len(reason) < 3:
        raise views.FormValueError("Reason: say in a few words why (at least 3 characters); it is kept in the history")
    return reason


def _asset_model(request: Request, asset: Any) -> LoadedModel:
    model = _loaded_model(request, asset.model_id)
    if model is None:
        raise Conflict(f"model {asset.model_id!r} of asset {asset.asset_id!r} is not served now, so its settings cannot change")
    return model


@router.post("/assets/{asset_id}/thresholds", response_class=HTMLResponse)
def apply_threshold(
    request: Request,
    asset_id: str,
    warning: Annotated[str, Form(max_length=40)] = "",
    critical: Annotated[str, Form(max_length=40)] = "",
    budget: Annotated[str, Form(max_length=40)] = "",
    reason: Annotated[str, Form(max_length=2000)] = "",
    csrf_token: Annotated[str | None, Form(alias=CSRF_FIELD)] = None,
) -> Response:
    def act(db: Session, user: WebUser, asset: Any) -> None:
        why = _reason(reason)
        model = _asset_model(request, asset)
        current_rule = threshold_q.rule_of(threshold_q.ensure_initial_version(db, asset=asset, manifest=model.manifest))
        inputs = _ThresholdInputs("budget" if budget.strip() else "level", warning, critical, budget)
        rule, budget_per_week, origin = _proposed_rule(current_rule, inputs, _calibration(model))
        threshold_q.set_threshold(
            db, asset=asset, rule=rule, origin=origin, reason=why, actor=user.name, manifest=model.manifest,
            budget_per_week=budget_per_week, details={"via": "dashboard"},
        )

    return _asset_action(request, asset_id, csrf_token, "applied", act)


@router.post("/assets/{asset_id}/thresholds/rollback", response_class=HTMLResponse)
def rollback_threshold(
    request: Request,
    asset_id: str,
    version: Annotated[int, Form(ge=1)] = 0,
    reason: Annotated[str, Form(max_length=2000)] = "",
    csrf_token: Annotated[str | None, Form(alias=CSRF_FIELD)] = None,
) -> Response:
    def act(db: Session, user: WebUser, asset: Any) -> None:
        why = _reason(reason)
        model = _asset_model(request, asset)
        threshold_q.rollback(db, asset=asset, to_version=version, reason=why, actor=user.name, manifest=model.manifest)

    return _asset_action(request, asset_id, csrf_token, "rolled_back", act)


@router.post("/assets/{asset_id}/shelve", response_class=HTMLResponse)
def shelve_asset(
    request: Request,
    asset_id: str,
    hours: Annotated[str, Form(max_length=20)] = "",
    reason: Annotated[str, Form(max_length=2000)] = "",
    csrf_token: Annotated[str | None, Form(alias=CSRF_FIELD)] = None,
) -> Response:
    def act(db: Session, user: WebUser, asset: Any) -> None:
        now = datetime.now(timezone.utc)
        threshold_q.shelve(db, asset=asset, until=views.shelve_until(hours, now), reason=_reason(reason), actor=user.name, now=now)

    return _asset_action(request, asset_id, csrf_token, "shelved", act)


@router.post("/assets/{asset_id}/unshelve", response_class=HTMLResponse)
def unshelve_asset(request: Request, asset_id: str, csrf_token: Annotated[str | None, Form(alias=CSRF_FIELD)] = None) -> Response:
    return _asset_action(
        request, asset_id, csrf_token, "unshelved", lambda db, user, asset: threshold_q.unshelve(db, asset=asset, actor=user.name)
    )
