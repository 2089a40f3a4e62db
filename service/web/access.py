"""Who is using the dashboard: the session codec of this app, the signed-in person, and the
same-site check on posts. The pages' role and CSRF checks build on these (routes._guard)."""

from __future__ import annotations

from dataclasses import dataclass
from urllib.parse import urlsplit

from fastapi import Request

from service.caller import PEOPLE_RANK, Caller
from service.db import web_sessions
from service.web.queries import key_by_id
from service.web.session import DEFAULT_MAX_AGE_S, SESSION_COOKIE, SessionCodec, WebSession, resolve_secret


def codec_for(request: Request) -> SessionCodec:
    """One codec per app; its secret comes from resolve_secret (settings, or the secret made
    once in the database, the same for every worker and replica)."""
    state = request.app.state
    codec = getattr(state, "web_codec", None)
    if codec is None:
        settings = state.settings
        configured = settings.session_secret.get_secret_value() if settings.session_secret is not None else None
        codec = SessionCodec(resolve_secret(configured, lambda: web_sessions.cluster_secret(state.db)), max_age_s=DEFAULT_MAX_AGE_S)
        state.web_codec = codec
    return codec


@dataclass(frozen=True)
class WebUser:
    """A person signed in to the dashboard: their key (as the API sees it), session and CSRF token."""

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


def current_user(request: Request) -> WebUser | None:
    """The signed-in person, looked up again by key id; None without a valid session (a
    cookie whose server-side session was ended by sign-out or key revocation included)."""
    codec = codec_for(request)
    web_session = codec.read(request.cookies.get(SESSION_COOKIE))
    if web_session is None:
        return None
    with request.app.state.db.engine.connect() as conn:
        if not web_sessions.holds(conn, sid=web_session.sid, key_id=web_session.key_id):
            return None
    with request.app.state.db.session() as db:
        row = key_by_id(db, key_id=web_session.key_id)
        if row is None or row.role not in PEOPLE_RANK:
            return None
        caller = Caller(row.id, row.name, row.role, frozenset(row.assets) if row.assets is not None else None)
    return WebUser(caller, web_session, codec.csrf_token(web_session))


def same_origin(request: Request) -> bool:
    """False when the Origin header names another site (a missing header passes: the CSRF token still has to match)."""
    origin = request.headers.get("origin")
    if not origin or origin == "null":
        return origin is None
    return urlsplit(origin).netloc == request.headers.get("host", "")
