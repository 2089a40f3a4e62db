"""The dashboard's pages (server-rendered, Jinja2 with autoescape) and their form posts.

Thin routes: check who is asking (service/web/access.py), call the service's query
functions or assemble a page (service/web/pages.py), render. The pages compute nothing
the API does not.

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
from datetime import datetime, timezone
from pathlib import Path
from typing import Annotated, Any
from urllib.parse import urlencode

from fastapi import APIRouter, Depends, Form, Query, Request
from fastapi.responses import HTMLResponse, JSONResponse, RedirectResponse, Response
from jinja2 import Environment, FileSystemLoader, select_autoescape
from pydantic import ValidationError
from sqlalchemy.orm import Session

from service import actions
from service.alerting import AlertRule
from service.api.deps import PEOPLE_RANK
from service.api.errors import http_status
from service.db import alerts as alert_q
from service.db import readings as readings_q
from service.db import web_sessions
from service.db.keys import find_key
from service.errors import KilterError
from service.models_registry import LoadedModel
from service.web import pages, views
from service.web.access import WebUser, codec_for, current_user, same_origin
from service.web.session import (
    CSRF_FIELD,
    DEFAULT_MAX_AGE_S,
    SESSION_COOKIE,
    SIGNIN_COOKIE,
    SIGNIN_MAX_AGE_S,
    cookie_options,
)

TEMPLATE_DIR = Path(__file__).parent / "templates"
PAGE_SIZE = 25

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
    "test_queued": "Test message queued: the service sends it within a few seconds.",
}


# --------------------------------------------------------------------------- plumbing


def _read_session(request: Request) -> Session:
    return request.app.state.db.session()


@contextmanager
def _write(request: Request) -> Iterator[Session]:
    with request.app.state.db.transaction() as session:
        yield session


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


Guarded = tuple[WebUser | None, Response | None]


def _guard(request: Request, *, role: str = "maintenance", csrf: str | None = None, posting: bool = False) -> Guarded:
    """(user, None) when the request may go on, else (user or None, the response to send)."""
    user = current_user(request)
    if user is None:
        if posting:
            return None, _error_page(request, None, 401, "Signed out", "Your session has ended. Sign in again and repeat the change.", "/signin")
        return None, _to_signin(request)
    if not user.can(role):
        return user, _forbidden(request, user, role)
    if posting:
        codec = codec_for(request)
        if not same_origin(request) or not codec.csrf_ok(user.session, csrf):
            return user, _error_page(
                request,
                user,
                403,
                "Form refused",
                "This form did not carry a valid token from this dashboard (it may be from an old page, or from another site). "
                "Reload the page and try again.",
                _page_of(request.url.path),
            )
    return user, None


def _page_of(post_path: str) -> str:
    """The page a form was posted from: /alerts/7/note -> /alerts/7, /assets/p1/shelve -> its thresholds page."""
    parts = post_path.strip("/").split("/")
    if len(parts) >= 2 and parts[0] == "alerts" and parts[1].isdigit():
        return f"/alerts/{parts[1]}"
    if len(parts) >= 2 and parts[0] == "assets":
        return f"/assets/{parts[1]}/thresholds"
    return "/alerts"


def _after_post(path: str, done: str, anchor: str = "") -> RedirectResponse:
    sep = "&" if "?" in path else "?"
    return RedirectResponse(f"{path}{sep}done={done}{anchor}", status_code=303)


def _failed(request: Request, user: WebUser | None, e: KilterError, back: str) -> HTMLResponse:
    status = http_status(e)
    heading = {404: "Not found", 409: "Already changed", 422: "Cannot use that input"}.get(status, "Could not do that")
    return _error_page(request, user, status, heading, e.message, back)


# --------------------------------------------------------------------------- sign-in


@router.get("/", response_class=HTMLResponse)
def home(request: Request) -> Response:
    return RedirectResponse("/alerts", status_code=303)


def _safe_next(target: str | None) -> str:
    if not target or not target.startswith("/") or target.startswith("//") or "\\" in target:
        return "/alerts"
    return target


def _signin_page(request: Request, *, error: str | None = None, status: int = 200, next_path: str = "/alerts") -> HTMLResponse:
    codec = codec_for(request)
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
    if current_user(request) is not None:
        return RedirectResponse(_safe_next(next), status_code=303)
    return _signin_page(request, next_path=next or "/alerts")


@router.post("/signin", response_class=HTMLResponse)
def signin(
    request: Request,
    api_key: Annotated[str, Form(max_length=200)] = "",
    signin_token: Annotated[str, Form(max_length=200)] = "",
    next: Annotated[str, Form(max_length=500)] = "/alerts",
) -> Response:
    codec = codec_for(request)
    if not same_origin(request) or not codec.signin_ok(request.cookies.get(SIGNIN_COOKIE), signin_token):
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
    cookie, issued = codec.issue(key_id)
    # Recorded server-side, so every worker accepts it and sign-out or revocation ends it at once.
    web_sessions.start(request.app.state.db, sid=issued.sid, key_id=key_id,
                       expires_at=datetime.fromtimestamp(issued.expires_at_s, tz=timezone.utc))
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
    if user is not None:
        web_sessions.end(request.app.state.db, sid=user.session.sid)
    response = RedirectResponse("/signin?done=signed_out", status_code=303)
    response.delete_cookie(SESSION_COOKIE, path="/", httponly=True, samesite="strict", secure=request.url.scheme == "https")
    return response


# --------------------------------------------------------------------------- alerts


@dataclass(frozen=True)
class ListQuery:
    """The alert list's filters, page and order as the page and its live refresh take them."""

    filters: dict[str, str]
    cursor: str | None
    sort: str


def list_query(
    asset: Annotated[str | None, Query(max_length=64)] = None,
    state: Annotated[str | None, Query(max_length=32)] = None,
    severity: Annotated[str | None, Query(max_length=32)] = None,
    since: Annotated[str | None, Query(max_length=40)] = None,
    until: Annotated[str | None, Query(max_length=40)] = None,
    cursor: Annotated[str | None, Query(max_length=200)] = None,
    sort: Annotated[str | None, Query(max_length=16)] = None,
) -> ListQuery:
    filters = {"asset": asset or "", "state": state or "", "severity": severity or "", "since": since or "", "until": until or ""}
    return ListQuery(filters, cursor, sort or "priority")


def _alert_list(db: Session, user: WebUser, query: ListQuery) -> dict[str, Any]:
    return pages.alert_list(db, user=user, filters=query.filters, cursor=query.cursor, page_size=PAGE_SIZE, sort=query.sort)


@router.get("/alerts", response_class=HTMLResponse)
def alerts_page(request: Request, query: Annotated[ListQuery, Depends(list_query)]) -> Response:
    user, refused = _guard(request)
    if refused is not None or user is None:
        return refused  # type: ignore[return-value]
    with _read_session(request) as db:
        context = _alert_list(db, user, query)
    context.update(_live(request), live_src="/alerts/live" + (f"?{request.url.query}" if request.url.query else ""))
    return _render(request, "alerts.html", context, user=user)


def _live(request: Request) -> dict[str, Any]:
    every = request.app.state.settings.dashboard_refresh_s
    return {"live_every_s": f"{every:g}", "updated": datetime.now(timezone.utc).strftime("%H:%M")}


def _live_parts(request: Request, parts: dict[str, str], context: dict[str, Any], user: WebUser) -> JSONResponse:
    """The live refresh's answer: each page part rendered by the template the page includes."""
    html = {
        element: _env.get_template(template).render(request=request, user=user, csrf_token=user.csrf_token, static=_static_url, **context)
        for element, template in parts.items()
    }
    response = JSONResponse({"parts": html, "updated": _live(request)["updated"], "state": context.get("a", {}).get("state")})
    response.headers["Cache-Control"] = "no-store"
    return response


def _live_refused(user: WebUser | None) -> JSONResponse:
    message = "signed out: reload the page and sign in" if user is None else "not available with your key"
    return JSONResponse({"error": message}, status_code=401 if user is None else 403)


@router.get("/alerts/live")
def alerts_live(request: Request, query: Annotated[ListQuery, Depends(list_query)]) -> Response:
    """The alert list's rows and counts, for the page to refresh itself without a reload."""
    user = current_user(request)
    if user is None or not user.can("maintenance"):
        return _live_refused(user)
    with _read_session(request) as db:
        context = _alert_list(db, user, query)
    return _live_parts(request, {"live-tallies": "_alert_tallies.html", "live-table": "_alert_table.html"}, context, user)


@router.get("/alerts/{alert_id}/live")
def alert_live(request: Request, alert_id: int) -> Response:
    """The alert page's facts and history, for the page to refresh itself."""
    user = current_user(request)
    if user is None or not user.can("maintenance"):
        return _live_refused(user)
    with _read_session(request) as db:
        try:
            detail = alert_q.get_alert(db, alert_id=alert_id, allowed_assets=user.caller.assets)
        except KilterError as e:
            return JSONResponse({"error": e.message}, status_code=http_status(e))
        context = pages.alert_live(detail, pages.loaded_model(request.app.state.registry, detail.alert.model_id))
    return _live_parts(request, {"live-facts": "_alert_facts.html", "live-history": "_alert_history.html"}, context, user)


@router.get("/alerts/{alert_id}", response_class=HTMLResponse)
def alert_page(request: Request, alert_id: int) -> Response:
    user, refused = _guard(request)
    if refused is not None or user is None:
        return refused  # type: ignore[return-value]
    with _read_session(request) as db:
        try:
            context = pages.alert_detail(db, request.app.state.registry, alert_id=alert_id, user=user)
        except KilterError as e:
            return _failed(request, user, e, "/alerts")
    context.update(_live(request))
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
            act(db, user)  # service/actions.py: the API's function, its row lock and asset limits
    except KilterError as e:
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
        lambda db, u: actions.acknowledge_alert(db, caller=u.caller, alert_id=alert_id, note=_note(note)),
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
        lambda db, u: actions.close_alert(db, caller=u.caller, alert_id=alert_id, outcome=outcome, note=_note(note)),
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
        lambda db, u: actions.note_alert(db, caller=u.caller, alert_id=alert_id, note=note),
    )


# --------------------------------------------------------------------------- assets


@router.get("/assets", response_class=HTMLResponse)
def assets_page(request: Request) -> Response:
    user, refused = _guard(request)
    if refused is not None or user is None:
        return refused  # type: ignore[return-value]
    now = datetime.now(timezone.utc)
    silent_after = pages.silent_after(request.app.state.settings, request.app.state.registry)
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
                "model_provisional": pages.provisional_note(pages.loaded_model(request.app.state.registry, s.model_id)),
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
        inputs = pages.ThresholdInputs("budget" if by == "budget" else "level", warning or "", critical or "", budget or "")
    with _read_session(request) as db:
        try:
            context = pages.threshold_page(db, request.app.state.registry, request.app.state.settings, asset_id=asset_id, inputs=inputs)
        except KilterError as e:
            return _failed(request, user, e, "/assets")
    return _render(request, "thresholds.html", context, user=user)


def _asset_action(request: Request, asset_id: str, csrf: str | None, done: str, act: Callable[[Session, WebUser], object]) -> Response:
    user, refused = _guard(request, role="operator", csrf=csrf, posting=True)
    if refused is not None or user is None:
        return refused  # type: ignore[return-value]
    back = f"/assets/{asset_id}/thresholds"
    try:
        with _write(request) as db:
            act(db, user)  # service/actions.py: the API's function, under the asset's row lock
    except views.FormValueError as e:
        return _error_page(request, user, 422, "Cannot use that input", str(e), back)
    except KilterError as e:
        return _failed(request, user, e, back)
    except ValidationError as e:
        return _error_page(request, user, 422, "Cannot use that input", str(e.errors()[0].get("msg", e)), back)
    return _after_post(back, done)


def _reason(text: str | None) -> str:
    reason = (text or "").strip()
    if len(reason) < 3:
        raise views.FormValueError("Reason: say in a few words why (at least 3 characters); it is kept in the history")
    return reason


@router.post("/assets/{asset_id}/thresholds", response_class=HTMLResponse)
def apply_threshold(
    request: Request,
    asset_id: str,
    warning: Annotated[str, Form(max_length=40)] = "",
    critical: Annotated[str, Form(max_length=40)] = "",
    budget: Annotated[str, Form(max_length=40)] = "",
    reason: Annotated[str, Form(max_length=2000)] = "",
    confirm_missed: Annotated[list[int] | None, Form()] = None,
    confirm_short_history: Annotated[str, Form(max_length=8)] = "",
    csrf_token: Annotated[str | None, Form(alias=CSRF_FIELD)] = None,
) -> Response:
    def propose(current_rule: AlertRule, model: LoadedModel) -> actions.RuleChange:
        inputs = pages.ThresholdInputs("budget" if budget.strip() else "level", warning, critical, budget)
        rule, budget_per_week, origin = pages.proposed_rule(current_rule, inputs, pages.calibration_of(model))
        return actions.RuleChange(rule=rule, origin=origin, budget_per_week=budget_per_week, details={"via": "dashboard"})

    def act(db: Session, user: WebUser) -> None:
        # The API's check (service/actions.py): a risky change needs its risks named and a longer reason.
        actions.change_threshold(
            db, request.app.state.registry, caller=user.caller, asset_id=asset_id, reason=_reason(reason), propose=propose,
            confirm=actions.Confirmation(missed=list(confirm_missed or []), short_history=bool(confirm_short_history)),
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
    def act(db: Session, user: WebUser) -> None:
        actions.rollback_threshold(db, request.app.state.registry, caller=user.caller, asset_id=asset_id, to_version=version, reason=_reason(reason))

    return _asset_action(request, asset_id, csrf_token, "rolled_back", act)


@router.post("/assets/{asset_id}/shelve", response_class=HTMLResponse)
def shelve_asset(
    request: Request,
    asset_id: str,
    hours: Annotated[str, Form(max_length=20)] = "",
    reason: Annotated[str, Form(max_length=2000)] = "",
    csrf_token: Annotated[str | None, Form(alias=CSRF_FIELD)] = None,
) -> Response:
    def act(db: Session, user: WebUser) -> None:
        now = datetime.now(timezone.utc)
        actions.shelve_asset(db, caller=user.caller, asset_id=asset_id, until=views.shelve_until(hours, now), reason=_reason(reason), now=now)

    return _asset_action(request, asset_id, csrf_token, "shelved", act)


@router.post("/assets/{asset_id}/unshelve", response_class=HTMLResponse)
def unshelve_asset(request: Request, asset_id: str, csrf_token: Annotated[str | None, Form(alias=CSRF_FIELD)] = None) -> Response:
    return _asset_action(
        request, asset_id, csrf_token, "unshelved", lambda db, user: actions.unshelve_asset(db, caller=user.caller, asset_id=asset_id)
    )


# --------------------------------------------------------------------------- alert health, notifications


@router.get("/alert-health", response_class=HTMLResponse)
def alert_health_page(request: Request) -> Response:
    user, refused = _guard(request)
    if refused is not None or user is None:
        return refused  # type: ignore[return-value]
    with _read_session(request) as db:
        context = pages.alert_health_page(db, request.app.state.registry)
    return _render(request, "alert_health.html", context, user=user)


@router.get("/notify", response_class=HTMLResponse)
def notify_page(request: Request) -> Response:
    user, refused = _guard(request, role="admin")
    if refused is not None or user is None:
        return refused  # type: ignore[return-value]
    with _read_session(request) as db:
        context = pages.notify_page(db)
    return _render(request, "notify.html", context, user=user)


@router.post("/notify/routes/{route_id}/test", response_class=HTMLResponse)
def notify_test(request: Request, route_id: int, csrf_token: Annotated[str | None, Form(alias=CSRF_FIELD)] = None) -> Response:
    from service.db import outbox

    user, refused = _guard(request, role="admin", csrf=csrf_token, posting=True)
    if refused is not None or user is None:
        return refused  # type: ignore[return-value]
    try:
        with _write(request) as db:
            outbox.queue_test(db, route_id=route_id, actor=user.name)
    except KilterError as e:
        return _failed(request, user, e, "/notify")
    return _after_post("/notify", "test_queued")
