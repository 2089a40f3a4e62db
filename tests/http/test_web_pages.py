"""The dashboard's pages through the real app (TestClient, SQLite file, tiny ONNX model):
sessions, CSRF, roles, escaping and bad input. tests/browser drives the same pages in Chromium."""

from __future__ import annotations

import re
import time
from typing import Any

import tiny_model

Env = Any  # tests/http/conftest.py's Env (the `env` fixture); not imported: several conftest modules exist

CENTER = dict(zip(tiny_model.CHANNELS, tiny_model.CENTER))
SCALE = dict(zip(tiny_model.CHANNELS, tiny_model.SCALE))


def open_alert(env: Env, asset: str = "pump-01") -> int:
    """Readings far from the tiny model's centre on one channel: the rule opens an alert."""
    t0 = int(time.time() // 120 * 120) - 3600
    readings = []
    for i in range(40):
        values = dict(CENTER)
        if 10 <= i < 30:
            values["vibration_mm_s"] = CENTER["vibration_mm_s"] + 8 * SCALE["vibration_mm_s"]  # score 64/6 > warning 4
        readings.append({"ts": t0 + 60 * i, "values": values})
    r = env.post(asset, readings)
    assert r.status_code == 200, r.text
    assert r.json()["alerts_opened"] == 1
    return env.rows("SELECT id FROM alerts WHERE asset_id = ? ORDER BY id DESC", asset)[0][0]


def sign_in(env: Env, role: str, next_path: str = "/alerts") -> Any:
    env.client.cookies.clear()
    page = env.client.get("/signin")
    token = re.search(r'name="signin_token" value="([^"]+)"', page.text).group(1)
    return env.client.post(
        "/signin", data={"api_key": env.keys[role], "signin_token": token, "next": next_path}, follow_redirects=False
    )


def csrf(env: Env, path: str = "/alerts") -> str:
    return re.search(r'name="csrf_token" value="([^"]+)"', env.client.get(path).text).group(1)


def test_pages_need_a_session_and_posts_store_nothing(env: Env) -> None:
    alert_id = open_alert(env)
    for path in ("/alerts", f"/alerts/{alert_id}", "/assets", "/assets/pump-01/thresholds"):
        r = env.client.get(path, follow_redirects=False)
        assert r.status_code == 303 and r.headers["location"].startswith("/signin?next="), path
    r = env.client.post(f"/alerts/{alert_id}/acknowledge", data={"note": "x"}, follow_redirects=False)
    assert r.status_code == 401
    assert env.rows("SELECT state FROM alerts WHERE id = ?", alert_id) == [("unacknowledged",)]


def test_sign_in_sets_an_http_only_strict_cookie_and_stays_on_this_site(env: Env) -> None:
    r = sign_in(env, "maintenance", next_path="//elsewhere.example/x")
    assert r.status_code == 303 and r.headers["location"] == "/alerts"  # no open redirect
    cookie = next(c for c in r.headers.get_list("set-cookie") if c.startswith("kilter_session="))
    attrs = {a.strip().split("=")[0].lower() for a in cookie.split(";")[1:]}
    assert {"httponly", "samesite", "path", "max-age"} <= attrs
    assert "samesite=strict" in cookie.lower()
    assert "secure" not in attrs  # plain http on loopback; https pages get Secure
    assert env.keys["maintenance"] not in cookie  # the key itself never goes to the browser
    assert env.client.get("/alerts").status_code == 200


def test_sign_in_refuses_a_form_without_its_token_and_machine_keys(env: Env) -> None:
    env.client.get("/signin")
    r = env.client.post("/signin", data={"api_key": env.keys["operator"], "signin_token": "forged"}, follow_redirects=False)
    assert r.status_code == 403 and "kilter_session" not in r.headers.get("set-cookie", "")
    r = sign_in(env, "machine")
    assert r.status_code == 403 and "for machines posting readings" in r.text
    assert "kilter_session" not in r.headers.get("set-cookie", "")


def test_cross_site_post_is_refused_even_with_a_valid_token(env: Env) -> None:
    alert_id = open_alert(env)
    sign_in(env, "maintenance")
    token = csrf(env)
    r = env.client.post(
        f"/alerts/{alert_id}/acknowledge", data={"csrf_token": token}, headers={"Origin": "http://elsewhere.example"}, follow_redirects=False
    )
    assert r.status_code == 403 and f'href="/alerts/{alert_id}"' in r.text  # the way back to the alert
    assert env.rows("SELECT state FROM alerts WHERE id = ?", alert_id) == [("unacknowledged",)]
    r = env.client.post(f"/alerts/{alert_id}/acknowledge", data={"csrf_token": token}, follow_redirects=False)
    assert r.status_code == 303
    assert env.rows("SELECT state, acknowledged_by FROM alerts WHERE id = ?", alert_id) == [("acknowledged", "test-maintenance")]


def test_a_revoked_key_ends_its_session(env: Env) -> None:
    from service.db.keys import revoke_key

    sign_in(env, "maintenance")
    assert env.client.get("/alerts").status_code == 200
    key_id = env.rows("SELECT id FROM api_keys WHERE name = 'test-maintenance'")[0][0]
    with env.client.app.state.db.transaction() as s:
        assert revoke_key(s, key_id=key_id, actor="test")
    r = env.client.get("/alerts", follow_redirects=False)
    assert r.status_code == 303 and r.headers["location"].startswith("/signin")


def test_threshold_editor_is_for_operators_only(env: Env) -> None:
    open_alert(env)
    sign_in(env, "maintenance")
    assert env.client.get("/assets/pump-01/thresholds").status_code == 403
    assert "/thresholds" not in env.client.get("/assets").text
    token = csrf(env)
    for path, form in (
        ("/assets/pump-01/thresholds", {"warning": "5", "reason": "not allowed"}),
        ("/assets/pump-01/shelve", {"hours": "2", "reason": "not allowed"}),
        ("/assets/pump-01/unshelve", {}),
        ("/assets/pump-01/thresholds/rollback", {"version": "1", "reason": "not allowed"}),
    ):
        assert env.client.post(path, data={**form, "csrf_token": token}, follow_redirects=False).status_code == 403, path
    assert env.count("threshold_versions", "asset_id = 'pump-01'") == 1
    assert env.count("audit_log", "action LIKE 'asset.%' OR action = 'threshold.set'") == 0

    sign_in(env, "operator")
    page = env.client.get("/assets/pump-01/thresholds?by=level&warning=5")
    assert page.status_code == 200 and 'data-figure="would-open"' in page.text
    # Under an hour of stored scores: Apply asks to accept the short history by name, with a real reason.
    assert 'name="confirm_short_history"' in page.text and 'minlength="15"' in page.text and "Apply anyway as v2" in page.text
    assert "Advisory only: a threshold decides who is told" in page.text
    r = env.client.post(
        "/assets/pump-01/thresholds", data={"warning": "5", "reason": "quieter", "csrf_token": csrf(env)}, follow_redirects=False
    )
    assert r.status_code == 422 and "less than the 7.0 asset-days" in r.text
    r = env.client.post(
        "/assets/pump-01/thresholds", data={"warning": "5", "reason": "quieter", "confirm_short_history": "1", "csrf_token": csrf(env)},
        follow_redirects=False,
    )
    assert r.status_code == 422 and "at least 15 characters" in r.text
    assert env.count("threshold_versions", "asset_id = 'pump-01'") == 1
    r = env.client.post(
        "/assets/pump-01/thresholds",
        data={"warning": "5", "reason": "quieter at night, agreed with the shift", "confirm_short_history": "1", "csrf_token": csrf(env)},
        follow_redirects=False,
    )
    assert r.status_code == 303
    assert env.rows("SELECT version, warning, origin, created_by FROM threshold_versions WHERE asset_id = 'pump-01' ORDER BY version DESC")[0] == (
        2, 5.0, "manual", "test-operator"
    )
    r = env.client.post("/assets/pump-01/shelve", data={"hours": "2", "reason": "pump swap", "csrf_token": csrf(env)}, follow_redirects=False)
    assert r.status_code == 303
    assert env.rows("SELECT shelve_reason, shelved_by FROM assets WHERE asset_id = 'pump-01'") == [("pump swap", "test-operator")]
    page = env.client.get("/assets/pump-01/thresholds")
    assert "Shelved until" in page.text and "astate-shelved" in page.text
    r = env.client.post("/assets/pump-01/unshelve", data={"csrf_token": csrf(env)}, follow_redirects=False)
    assert r.status_code == 303
    assert env.rows("SELECT shelved_until FROM assets WHERE asset_id = 'pump-01'") == [(None,)]
    assert [a for (a,) in env.rows("SELECT action FROM audit_log WHERE action LIKE 'asset.%' ORDER BY id")] == ["asset.shelve", "asset.unshelve"]


def test_bad_threshold_input_names_the_field_and_stores_nothing(env: Env) -> None:
    open_alert(env)
    sign_in(env, "operator")
    token = csrf(env)
    cases = (
        ({"warning": "abc", "reason": "why not"}, "Warning level"),
        ({"warning": "-1", "reason": "why not"}, "Warning level"),
        ({"warning": "5", "critical": "2", "reason": "why not"}, "Critical level"),
        ({"warning": "5", "reason": ""}, "Reason"),
    )
    for form, field in cases:
        r = env.client.post("/assets/pump-01/thresholds", data={**form, "csrf_token": token}, follow_redirects=False)
        assert r.status_code == 422 and field in r.text, form
    page = env.client.get("/assets/pump-01/thresholds?by=budget&budget=zero")
    assert page.status_code == 200 and "False alarms per week" in page.text and 'data-figure="would-open"' not in page.text
    r = env.client.post("/assets/pump-01/shelve", data={"hours": "9999", "reason": "too long", "csrf_token": token}, follow_redirects=False)
    assert r.status_code == 422 and "720" in r.text
    assert env.count("threshold_versions", "asset_id = 'pump-01'") == 1
    assert env.rows("SELECT shelved_until FROM assets WHERE asset_id = 'pump-01'") == [(None,)]


def test_user_text_is_escaped_everywhere(env: Env) -> None:
    alert_id = open_alert(env)
    env.keys["maintenance"] = env.add_key("maintenance", '<img src=x onerror="alert(1)">')
    sign_in(env, "maintenance")
    r = env.client.post(
        f"/alerts/{alert_id}/note", data={"note": "<script>alert('x')</script>", "csrf_token": csrf(env)}, follow_redirects=True
    )
    assert r.status_code == 200
    assert "<script>alert(" not in r.text and "&lt;script&gt;alert(" in r.text
    assert "<img src=x" not in r.text and "&lt;img src=x" in r.text
    assert "default-src 'self'" in r.headers["content-security-policy"]


def test_acting_twice_says_what_state_the_alert_is_in(env: Env) -> None:
    alert_id = open_alert(env)
    sign_in(env, "maintenance")
    token = csrf(env)
    r = env.client.post(f"/alerts/{alert_id}/close", data={"outcome": "false_alarm", "csrf_token": token}, follow_redirects=False)
    assert r.status_code == 303
    r = env.client.post(f"/alerts/{alert_id}/acknowledge", data={"csrf_token": token}, follow_redirects=False)
    assert r.status_code == 409 and "closed" in r.text
    r = env.client.post(f"/alerts/{alert_id}/close", data={"outcome": "broken", "csrf_token": token}, follow_redirects=False)
    assert r.status_code in (409, 422)
    assert env.rows("SELECT state, outcome FROM alerts WHERE id = ?", alert_id) == [("closed", "false_alarm")]


def test_alert_list_filters_and_reports_bad_dates(env: Env) -> None:
    open_alert(env, "pump-01")
    open_alert(env, "pump-02")
    sign_in(env, "maintenance")
    page = env.client.get("/alerts?asset=pump-02")
    assert re.findall(r'<tr data-alert-id="(\d+)"', page.text) == [str(env.rows("SELECT id FROM alerts WHERE asset_id = 'pump-02'")[0][0])]
    assert 'data-state="unacknowledged">1<' in page.text  # the counts follow the asset filter
    whole = env.client.get("/alerts").text
    assert 'data-state="unacknowledged">2<' in whole
    # Plain counts inside the filter form, each a link that filters by its state.
    tallies = re.search(r'<p class="tallies".*?</p>', whole, re.S).group(0)
    start = whole.index('<form class="filters')
    assert start < whole.index('<p class="tallies"') < whole.index("</form>", start)
    assert re.findall(r'href="/alerts\?state=(\w+)"', tallies) == ["unacknowledged", "acknowledged", "closed"]
    assert "2</span> need acknowledging" in tallies and "0</span> closed" in tallies and "statebar" not in whole
    # The condition beside the state, the peak as a multiple of the warning level (10.7 / 4).
    assert whole.count('<td class="hide-phone"><span class="cond cond-returned">returned</span></td>') == 2 and "2.67x warning</span>" in whole  # condition column, peak as a multiple of warning
    page = env.client.get("/alerts?since=yesterday")
    assert page.status_code == 200 and "Opened from" in page.text and "not a date and time" in page.text


def test_alert_list_pages_newest_first_without_repeats(env: Env) -> None:
    from datetime import datetime, timedelta, timezone

    from service.db import rule_alerts

    open_alert(env)  # makes the asset and its threshold version
    env.client.cookies.clear()
    base = datetime(2026, 9, 1, tzinfo=timezone.utc)
    with env.client.app.state.db.transaction() as s:
        conn = s.connection()
        for i in range(27):  # one active alert per asset at a time: open and return each in turn
            alert = rule_alerts.open_alert(
                conn, asset_id="pump-01", severity="warning", at=base + timedelta(hours=i), score=5.0,
                top_channels=[{"channel": "vibration_mm_s", "share": 1.0}], model_id="test-pumps", model_version="1",
                threshold_version_id=None, details={},
            )
            rule_alerts.return_alert(conn, alert, at=base + timedelta(hours=i, minutes=30), details={})
    sign_in(env, "maintenance")
    ids_in_db = [i for (i,) in env.rows("SELECT id FROM alerts ORDER BY opened_at DESC, id DESC")]
    first = env.client.get("/alerts")
    page1 = [int(i) for i in re.findall(r'<tr data-alert-id="(\d+)"', first.text)]
    older = re.search(r'href="(/alerts\?cursor=[^"]+)" rel="next"', first.text).group(1)
    second = env.client.get(older.replace("&amp;", "&"))
    page2 = [int(i) for i in re.findall(r'<tr data-alert-id="(\d+)"', second.text)]
    assert page1 + page2 == ids_in_db and len(page1) == 25
    assert 'rel="next"' not in second.text and "« Newest" in second.text


def test_live_refresh_answers_the_pages_changing_parts(env: Env) -> None:
    first = open_alert(env, "pump-01")
    assert env.client.get("/alerts/live").status_code == 401  # no session: the page says so and stops
    sign_in(env, "maintenance")
    page = env.client.get("/alerts")
    assert 'data-live-src="/alerts/live"' in page.text and 'id="live-updated"' in page.text
    live = env.client.get("/alerts/live").json()
    assert re.findall(r'<tr data-alert-id="(\d+)"', live["parts"]["live-table"]) == [str(first)]
    assert re.fullmatch(r"\d\d:\d\d", live["updated"])
    second = open_alert(env, "pump-02")  # arrives while the page is open
    live = env.client.get("/alerts/live?asset=pump-02").json()
    assert re.findall(r'<tr data-alert-id="(\d+)"', live["parts"]["live-table"]) == [str(second)]
    assert 'data-state="unacknowledged">1<' in live["parts"]["live-tallies"]
    one = env.client.get(f"/alerts/{first}/live").json()
    assert one["state"] == "unacknowledged" and 'data-kind="opened"' in one["parts"]["live-history"]
    r = env.client.post(f"/alerts/{first}/acknowledge", data={"csrf_token": csrf(env, f"/alerts/{first}")}, follow_redirects=False)
    assert r.status_code == 303
    one = env.client.get(f"/alerts/{first}/live").json()
    assert one["state"] == "acknowledged" and 'data-kind="acknowledged"' in one["parts"]["live-history"]
    assert env.client.get("/alerts/99999/live").status_code == 404


def test_alert_health_and_notification_pages(env: Env) -> None:
    open_alert(env, "pump-01")
    sign_in(env, "maintenance")
    page = env.client.get("/alert-health")
    assert page.status_code == 200 and 'id="health-table"' in page.text
    api = env.client.get("/v1/alert-health", headers={"Authorization": f"Bearer {env.keys['maintenance']}"}).json()
    assert re.findall(r'<tr data-figure="(\w+)"', page.text) == [f["name"] for f in api["figures"]]
    assert "alerts per asset-day" in page.text and "not a safety system" in page.text
    assert env.client.get("/notify", follow_redirects=False).status_code == 403  # admins only
    sign_in(env, "admin")
    from service.db import outbox

    with env.client.app.state.db.transaction() as s:
        route, _ = outbox.add_route(s, name="desk-hook", channel="webhook", target="http://127.0.0.1:9/hook", actor="t")
        route_id = route.id
    page = env.client.get("/notify")
    assert "desk-hook" in page.text and "Send test" in page.text
    r = env.client.post(f"/notify/routes/{route_id}/test", data={"csrf_token": csrf(env, "/notify")}, follow_redirects=False)
    assert r.status_code == 303 and "done=test_queued" in r.headers["location"]
    # Queued (the running sender may already be trying the unreachable port: never sent).
    assert [(k, st in ("pending", "sending")) for k, st in env.rows("SELECT kind, status FROM notify_outbox")] == [("test", True)]
    r = env.client.post(f"/notify/routes/{route_id}/test", data={"csrf_token": "forged"}, follow_redirects=False)
    assert r.status_code == 403 and env.count("notify_outbox", "1 = 1") == 1


def test_a_provisional_model_is_marked_where_the_model_is_shown(tmp_path: Any) -> None:
    """Issue 12: a model calibrated on too little data says so on the dashboard and in /v1/models."""
    from service_env import start_env

    note = {
        "reason": "the thresholds rest on 187 normal calibration windows (1.3 asset-days on 2 assets)",
        "calibration_windows": 187,
        "calibration_asset_days": 1.3,
        "windows_needed": 1500,
        "asset_days_needed": 10.4,
        "advice": "add about 30 more days of normal history per asset",
    }
    tiny_model.build(tmp_path / "models", provisional=note)
    gen = start_env(tmp_path, tmp_path / "models")
    env = next(gen)
    try:
        alert_id = open_alert(env)
        sign_in(env, "maintenance")
        assets = env.client.get("/assets").text
        assert "state-provisional" in assets and "1.3 asset-days" in assets
        detail = env.client.get(f"/alerts/{alert_id}").text
        assert ">provisional<" in detail and "Add about 30 more days of normal history per asset" in detail
        models = env.client.get("/v1/models", headers={"Authorization": f"Bearer {env.keys['admin']}"}).json()
        assert models["items"][0]["provisional"] == note["reason"]
        sign_in(env, "operator")
        history = env.client.get("/assets/pump-01/thresholds").text
        assert "calibrated by the trainer: set by hand; provisional model, too little calibration data" in history
    finally:
        gen.close()


def test_a_model_with_enough_data_shows_no_provisional_mark(env: Env) -> None:
    alert_id = open_alert(env)
    sign_in(env, "maintenance")
    assert "state-provisional" not in env.client.get("/assets").text
    assert ">provisional<" not in env.client.get(f"/alerts/{alert_id}").text
