"""Dashboard sessions: an API key signs in once, the browser then carries a signed cookie.

The cookie is HttpOnly, SameSite=Strict, Secure when the page came over https, and holds
only the key's id, a random session id and the issue/expiry times, signed with
HMAC-SHA256 under the service's session secret. It names no role: every request looks
the key up again, so revoking a key or changing its role takes effect at once. The session
itself is recorded server-side (service/db/web_sessions.py): sign-out and key revocation
end it for every worker and replica at once, whatever the cookie still says.

CSRF: every state-changing form carries a token derived from the session id
(HMAC(secret, "csrf:" + sid)); a post whose token does not match is refused. The
sign-in form, which has no session yet, carries a token tied to a short-lived
pre-sign-in cookie the same way. Both compare in constant time.
"""

from __future__ import annotations

import base64
import hashlib
import hmac
import json
import logging
import secrets
import time
from collections.abc import Callable
from dataclasses import dataclass

log = logging.getLogger("kilter.web")

SESSION_COOKIE = "kilter_session"
SIGNIN_COOKIE = "kilter_signin"
CSRF_FIELD = "csrf_token"
DEFAULT_MAX_AGE_S = 8 * 3600  # one shift
SIGNIN_MAX_AGE_S = 15 * 60
MIN_SECRET_BYTES = 16


def _b64(data: bytes) -> str:
    return base64.urlsafe_b64encode(data).rstrip(b"=").decode("ascii")


def _unb64(text: str) -> bytes:
    return base64.urlsafe_b64decode(text + "=" * (-len(text) % 4))


@dataclass(frozen=True)
class WebSession:
    """What a valid session cookie says: which key signed in, and when."""

    key_id: int
    sid: str
    issued_at_s: int
    expires_at_s: int


class SessionCodec:
    """Signs and checks session cookies and CSRF tokens under one secret."""

    def __init__(self, secret: bytes, max_age_s: int = DEFAULT_MAX_AGE_S) -> None:
        if len(secret) < MIN_SECRET_BYTES:
            raise ValueError(f"the session secret must be at least {MIN_SECRET_BYTES} bytes")
        self._secret = secret
        self.max_age_s = max_age_s

    def _sign(self, purpose: str, payload: bytes) -> bytes:
        return hmac.new(self._secret, purpose.encode() + b"\x00" + payload, hashlib.sha256).digest()

    # -- session cookie --------------------------------------------------------------
    def issue(self, key_id: int, now_s: float | None = None) -> tuple[str, WebSession]:
        now = int(now_s if now_s is not None else time.time())
        session = WebSession(key_id=key_id, sid=secrets.token_urlsafe(18), issued_at_s=now, expires_at_s=now + self.max_age_s)
        body = json.dumps(
            {"k": session.key_id, "s": session.sid, "i": session.issued_at_s, "e": session.expires_at_s}, separators=(",", ":")
        ).encode()
        return f"{_b64(body)}.{_b64(self._sign('session', body))}", session

    def read(self, cookie: str | None, now_s: float | None = None) -> WebSession | None:
        """The session a cookie carries, or None if it is missing, tampered with or expired."""
        if not cookie or cookie.count(".") != 1:
            return None
        body_text, sig_text = cookie.split(".")
        try:
            body, sig = _unb64(body_text), _unb64(sig_text)
        except (ValueError, TypeError):
            return None
        if not hmac.compare_digest(sig, self._sign("session", body)):
            return None
        try:
            data = json.loads(body)
            session = WebSession(key_id=int(data["k"]), sid=str(data["s"]), issued_at_s=int(data["i"]), expires_at_s=int(data["e"]))
        except (ValueError, KeyError, TypeError):
            return None
        now = now_s if now_s is not None else time.time()
        if now >= session.expires_at_s:
            return None
        return session

    # -- CSRF ------------------------------------------------------------------------
    def csrf_token(self, session: WebSession) -> str:
        return _b64(self._sign("csrf", session.sid.encode()))

    def csrf_ok(self, session: WebSession, token: str | None) -> bool:
        return bool(token) and hmac.compare_digest(str(token).encode(), self.csrf_token(session).encode())

    # -- the sign-in form, before any session exists ----------------------------------
    def new_signin_nonce(self) -> str:
        return secrets.token_urlsafe(18)

    def signin_token(self, nonce: str) -> str:
        return _b64(self._sign("signin", nonce.encode()))

    def signin_ok(self, nonce: str | None, token: str | None) -> bool:
        if not nonce or not token:
            return False
        return hmac.compare_digest(str(token).encode(), self.signin_token(nonce).encode())


def cookie_options(*, secure: bool, max_age_s: int) -> dict[str, object]:
    """Keyword arguments for Response.set_cookie shared by both cookies."""
    return {"max_age": max_age_s, "httponly": True, "samesite": "strict", "secure": secure, "path": "/"}


def resolve_secret(configured: str | None, stored: Callable[[], str]) -> bytes:
    """The key that signs session cookies: `configured` (settings.session_secret) when
    given, else `stored()`, the secret made once in the database and read by every worker and
    replica (service/db/web_sessions.cluster_secret)."""
    if configured:
        secret = configured.encode("utf-8")
        if len(secret) < MIN_SECRET_BYTES:
            raise ValueError(f"KILTER_SESSION_SECRET must be at least {MIN_SECRET_BYTES} characters, got {len(secret)}")
        return secret
    text = stored().strip()
    if len(text) < MIN_SECRET_BYTES:
        raise ValueError(f"the session secret stored in the database is shorter than {MIN_SECRET_BYTES} characters")
    return text.encode("utf-8")
