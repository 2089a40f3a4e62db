"""Dashboard session cookies and CSRF tokens: signed, expiring, bound to one session."""

from __future__ import annotations

import pytest

from service.web.session import SessionCodec

SECRET = b"0123456789abcdef-test-secret"


def test_round_trip_and_expiry() -> None:
    codec = SessionCodec(SECRET, max_age_s=600)
    cookie, session = codec.issue(7, now_s=1_000_000)
    assert codec.read(cookie, now_s=1_000_599) == session
    assert session.key_id == 7
    assert codec.read(cookie, now_s=1_000_600) is None


@pytest.mark.parametrize("mangle", [lambda c: c[:-2] + ("A" if c[-2] != "A" else "B") + c[-1], lambda c: "x" + c, lambda c: c.replace(".", ""), lambda c: ""])
def test_tampered_cookie_is_refused(mangle) -> None:
    codec = SessionCodec(SECRET)
    cookie, _ = codec.issue(7)
    assert codec.read(mangle(cookie)) is None


def test_cookie_signed_under_another_secret_is_refused() -> None:
    cookie, _ = SessionCodec(b"another-secret-of-16-bytes").issue(1)
    assert SessionCodec(SECRET).read(cookie) is None


def test_forged_key_id_needs_the_secret() -> None:
    import base64
    import json

    codec = SessionCodec(SECRET)
    cookie, _ = codec.issue(7)
    body, sig = cookie.split(".")
    data = json.loads(base64.urlsafe_b64decode(body + "=" * (-len(body) % 4)))
    data["k"] = 1
    forged = base64.urlsafe_b64encode(json.dumps(data, separators=(",", ":")).encode()).rstrip(b"=").decode()
    assert codec.read(f"{forged}.{sig}") is None


def test_csrf_token_bound_to_its_session() -> None:
    codec = SessionCodec(SECRET)
    _, a = codec.issue(7)
    _, b = codec.issue(7)
    token = codec.csrf_token(a)
    assert codec.csrf_ok(a, token)
    assert not codec.csrf_ok(b, token)
    assert not codec.csrf_ok(a, None) and not codec.csrf_ok(a, "")


def test_signin_token_bound_to_its_nonce() -> None:
    codec = SessionCodec(SECRET)
    n1, n2 = codec.new_signin_nonce(), codec.new_signin_nonce()
    assert n1 != n2
    assert codec.signin_ok(n1, codec.signin_token(n1))
    assert not codec.signin_ok(n2, codec.signin_token(n1))
    assert not codec.signin_ok(None, codec.signin_token(n1))


def test_short_secret_rejected() -> None:
    with pytest.raises(ValueError, match="16 bytes"):
        SessionCodec(b"short")


def test_secret_from_settings_wins_and_must_be_long_enough() -> None:
    from service.web.session import resolve_secret

    asked: list[int] = []

    def stored() -> str:
        asked.append(1)
        return "a" * 64

    assert resolve_secret("a-configured-secret-value", stored) == b"a-configured-secret-value"
    assert not asked  # the database is not asked when the settings give a secret
    with pytest.raises(ValueError, match="at least 16"):
        resolve_secret("short", stored)


def test_without_a_setting_the_stored_secret_is_used_and_checked() -> None:
    from service.web.session import resolve_secret

    assert resolve_secret(None, lambda: "b" * 64) == b"b" * 64
    with pytest.raises(ValueError, match="shorter than 16"):
        resolve_secret(None, lambda: "short")
