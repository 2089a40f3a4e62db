"""Access: bearer keys, roles, asset limits, and a walk over every route the app registers
proving each refuses a request without a key (so a new route cannot be left open)."""

from __future__ import annotations

import re
from datetime import datetime, timezone

import pytest
from readings_support import readings

from service.db.keys import hash_key

# Open by design: liveness/readiness/metrics, the API docs, the dashboard's sign-in page
# (and the root that sends a browser there), and static files (not routes of their own).
PUBLIC = {
    ("GET", "/healthz"), ("GET", "/readyz"), ("GET", "/metrics"),
    ("GET", "/openapi.json"), ("GET", "/docs"), ("GET", "/docs/assets/kilter-docs.js"), ("GET", "/docs/assets/{name}"),
    ("GET", "/"), ("GET", "/signin"), ("POST", "/signin"),
}
SAMPLE = {"asset_id": "pump-01", "alert_id": "1", "route_id": "1", "message_id": "1"}


def registered_routes(app) -> list[tuple[str, str]]:
    """(method, path template) of every route, including those of included routers."""
    out = []
    for route in app.routes:
        if hasattr(route, "effective_route_contexts"):  # an included router (FastAPI >= 0.13x)
            items = [(ctx.methods, ctx.path) for ctx in route.effective_route_contexts()]
        elif getattr(route, "methods", None):
            items = [(route.methods, route.path)]
        else:
            continue  # a Mount (static files)
        for methods, path in items:
            out += [(m, path) for m in sorted(methods or ()) if m != "HEAD"]
    return out


def refused(r) -> bool:
    if r.status_code in (401, 403):
        return True
    # Dashboard pages send a browser without a session to the sign-in page.
    return r.status_code in (302, 303, 307) and r.headers.get("location", "").startswith("/signin")


def test_every_route_refuses_a_request_without_a_key(env) -> None:
    routes = registered_routes(env.client.app)
    walked = [(m, p) for m, p in routes if (m, p) not in PUBLIC]
    # The walk must cover the API and the dashboard, or it proves nothing.
    assert ("POST", "/v1/assets/{asset_id}/readings") in walked and ("GET", "/v1/alerts") in walked
    assert len(walked) >= 20
    open_routes = []
    for method, template in walked:
        path = re.sub(r"\{(\w+)\}", lambda m: SAMPLE.get(m.group(1), "x"), template)
        for headers in ({}, {"Authorization": "Bearer kt_not-a-key"}, {"Authorization": "Basic dXNlcjpwYXNz"}):
            r = env.client.request(method, path, headers=headers, json={}, follow_redirects=False)
            if not refused(r):
                open_routes.append((method, template, headers, r.status_code))
    assert open_routes == []
    assert env.count("readings") == 0 and env.count("alerts") == 0


def test_public_routes_answer_without_a_key(env) -> None:
    for path in ("/healthz", "/readyz", "/metrics", "/openapi.json", "/docs"):
        assert env.client.get(path).status_code == 200, path


def test_401_says_how_and_carries_www_authenticate(env) -> None:
    r = env.client.get("/v1/assets")
    assert r.status_code == 401 and r.headers["www-authenticate"] == "Bearer"
    assert "Authorization: Bearer" in r.json()["error"]["message"]
    wrong = env.client.get("/v1/assets", headers={"Authorization": "Bearer ew_wrong"})
    assert wrong.status_code == 401 and "unknown or revoked" in wrong.json()["error"]["message"]


def test_revoked_key_is_refused(env) -> None:
    key = env.add_key("maintenance", "leaver")
    assert env.client.get("/v1/assets", headers={"Authorization": f"Bearer {key}"}).status_code == 200
    env.execute("UPDATE api_keys SET revoked_at=? WHERE key_hash=?", datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M:%S.%f"), hash_key(key))
    assert env.client.get("/v1/assets", headers={"Authorization": f"Bearer {key}"}).status_code == 401


@pytest.mark.parametrize(
    ("role", "post_ok", "read_ok"),
    [("machine", True, False), ("maintenance", False, True), ("operator", False, True), ("admin", True, True)],
)
def test_roles(env, role: str, post_ok: bool, read_ok: bool) -> None:
    r = env.post("pump-01", readings(range(3)), role=role)
    assert (r.status_code == 200) is post_ok, r.text
    if not post_ok:
        assert r.status_code == 403 and "machine" in r.json()["error"]["message"]
    g = env.client.get("/v1/assets", headers=env.auth(role))
    assert (g.status_code == 200) is read_ok
    s = env.client.post("/v1/score", json={"windows": []}, headers=env.auth(role))
    assert (s.status_code == 200) is post_ok


def test_only_hashes_are_stored(env) -> None:
    stored = {h for (h,) in env.rows("SELECT key_hash FROM api_keys")}
    for key in env.keys.values():
        assert hash_key(key) in stored
    if not env.db_path.exists():
        return  # the suite's PostgreSQL run: no file to search
    raw = env.db_path.read_bytes() + b"".join(p.read_bytes() for p in env.db_path.parent.glob("kilter.db-*"))
    assert not any(key.encode() in raw for key in env.keys.values())
