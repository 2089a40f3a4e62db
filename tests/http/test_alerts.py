"""GET /v1/alerts (filters, priority and newest-first order, keyset pagination), detail, acknowledge, close, notes."""

from __future__ import annotations

from datetime import timedelta

import pytest
from sqlalchemy import select

from alerts_support import T0, Service, add_alert, add_asset, alert_row, running
from service.db.models import AlertEvent, AuditLog

H = timedelta(hours=1)


@pytest.fixture()
def svc(tmp_path):
    with running(tmp_path) as s:
        add_asset(s, "pump-01")
        add_asset(s, "pump-02")
        yield s


def ids(resp) -> list[int]:
    assert resp.status_code == 200, resp.text
    return [a["id"] for a in resp.json()["items"]]


def test_list_is_newest_first_and_filters(svc: Service):
    a1 = add_alert(svc, "pump-01", T0 + 1 * H, returned_at=T0 + 2 * H)
    a2 = add_alert(svc, "pump-02", T0 + 3 * H, severity="critical")
    a3 = add_alert(svc, "pump-01", T0 + 5 * H)
    c = svc.client
    assert ids(c.get("/v1/alerts", params={"sort": "newest"}, headers=svc.h("maintenance"))) == [a3, a2, a1]
    assert ids(c.get("/v1/alerts", params={"asset": "pump-01"}, headers=svc.h("maintenance"))) == [a3, a1]
    assert ids(c.get("/v1/alerts", params={"severity": "critical"}, headers=svc.h("maintenance"))) == [a2]
    assert ids(c.get("/v1/alerts", params={"condition": "returned"}, headers=svc.h("maintenance"))) == [a1]
    c.post(f"/v1/alerts/{a2}/acknowledge", headers=svc.h("maintenance"))
    assert ids(c.get("/v1/alerts", params={"state": "acknowledged"}, headers=svc.h("maintenance"))) == [a2]
    assert ids(c.get("/v1/alerts", params={"state": "unacknowledged"}, headers=svc.h("maintenance"))) == [a3, a1]
    # Time range: spans [opened, last seen] meeting [since, until).
    window = {"since": (T0 + 1.5 * H).isoformat(), "until": (T0 + 4 * H).isoformat()}
    assert ids(c.get("/v1/alerts", params=window, headers=svc.h("maintenance"))) == [a2, a1]
    body = c.get("/v1/alerts", params={"asset": "pump-01"}, headers=svc.h("maintenance")).json()["items"][1]
    assert body["opened_at"] == "2026-10-13T01:00:00Z" and body["returned_at"] == "2026-10-13T02:00:00Z"
    assert body["duration_s"] == 3600.0 and body["top_channels"][0] == {"channel": "vibration_mm_s", "share": 0.6}


BAD_FILTERS = [
    ({"state": "open"}, "query.state"),
    ({"severity": "minor"}, "query.severity"),
    ({"condition": "cleared"}, "query.condition"),
    ({"limit": 0}, "query.limit"),
    ({"cursor": "not-a-cursor"}, "query.cursor"),
    ({"sort": "oldest"}, "query.sort"),
    ({"since": "2026-10-13T05:00:00"}, "query.since"),  # no offset: ambiguous
    ({"since": "2026-10-13T05:00:00Z", "until": "2026-10-13T04:00:00Z"}, "query.until"),
]


def test_bad_filters_name_the_field(svc: Service):
    for params, field in BAD_FILTERS:
        r = svc.client.get("/v1/alerts", params=params, headers=svc.h("maintenance"))
        assert r.status_code == 422, (params, r.text)
        assert r.json()["error"]["field"] == field, params


def test_cursor_pages_stay_correct_while_alerts_arrive(svc: Service):
    first = [add_alert(svc, f"pump-0{1 + i % 2}", T0 + i * H, returned_at=T0 + i * H + 10 * timedelta(minutes=1)) for i in range(7)]
    expected = list(reversed(first))
    c, seen = svc.client, []
    page = c.get("/v1/alerts", params={"limit": 3}, headers=svc.h("maintenance")).json()
    seen += [a["id"] for a in page["items"]]
    # Newer alerts arrive between page fetches: they belong before page 1, never on later pages.
    newer = [add_alert(svc, "pump-01", T0 + 20 * H), add_alert(svc, "pump-02", T0 + 21 * H, returned_at=T0 + 22 * H)]
    # A same-instant alert as the cursor's row, with a higher id, also sorts before it.
    same_instant = add_alert(svc, "pump-02", T0 + 4 * H, returned_at=T0 + 5 * H)
    while page["next_cursor"]:
        page = c.get("/v1/alerts", params={"limit": 3, "cursor": page["next_cursor"]}, headers=svc.h("maintenance")).json()
        seen += [a["id"] for a in page["items"]]
    assert seen == expected  # every original alert once, in order
    assert not set(newer + [same_instant]) & set(seen)
    # A fresh listing shows everything, newest first.
    everything = ids(c.get("/v1/alerts", params={"limit": 200, "sort": "newest"}, headers=svc.h("maintenance")))
    assert everything[:2] == [newer[1], newer[0]] and len(everything) == 10
    assert everything.index(same_instant) < everything.index(first[4])


def test_default_order_puts_what_needs_someone_first(svc: Service):
    """Active before returned, unacknowledged before acknowledged, critical before warning,
    newest first within each; closed last. Pages follow the same order through the cursor."""
    c, h = svc.client, svc.h("maintenance")
    returned_crit = add_alert(svc, "pump-01", T0 + 1 * H, returned_at=T0 + 2 * H, severity="critical", peak=9.0)
    closed = add_alert(svc, "pump-01", T0 + 6 * H, returned_at=T0 + 7 * H, severity="critical")
    returned_warn = add_alert(svc, "pump-02", T0 + 2 * H, returned_at=T0 + 2.5 * H)
    acked_returned = add_alert(svc, "pump-02", T0 + 8 * H, returned_at=T0 + 9 * H)
    active_crit = add_alert(svc, "pump-01", T0 + 10 * H, severity="critical", peak=12.0)
    active_warn = add_alert(svc, "pump-02", T0 + 11 * H)
    assert c.post(f"/v1/alerts/{acked_returned}/acknowledge", headers=h).status_code == 200
    assert c.post(f"/v1/alerts/{closed}/close", json={"outcome": "false_alarm"}, headers=h).status_code == 200
    want = [active_crit, active_warn, returned_crit, returned_warn, acked_returned, closed]
    assert ids(c.get("/v1/alerts", headers=h)) == want
    walked, page = [], c.get("/v1/alerts", params={"limit": 4}, headers=h).json()
    walked += [a["id"] for a in page["items"]]
    page = c.get("/v1/alerts", params={"limit": 4, "cursor": page["next_cursor"]}, headers=h).json()
    walked += [a["id"] for a in page["items"]]
    assert walked == want and page["next_cursor"] is None
    # A newest-first cursor is refused in priority order (and the other way round).
    newest = c.get("/v1/alerts", params={"limit": 2, "sort": "newest"}, headers=h).json()["next_cursor"]
    r = c.get("/v1/alerts", params={"cursor": newest}, headers=h)
    assert r.status_code == 422 and r.json()["error"]["field"] == "query.cursor"
    # The peak as a multiple of the warning level in force when it opened.
    top = c.get("/v1/alerts", headers=h).json()["items"][0]
    assert top["condition"] == "active" and top["warning_level"] > 0
    assert top["peak_ratio"] == pytest.approx(12.0 / top["warning_level"])


def test_backfilled_older_alert_appears_on_a_later_page(svc: Service):
    ids_ = [add_alert(svc, "pump-01", T0 + i * H, returned_at=T0 + i * H + timedelta(minutes=5)) for i in range(2, 6)]
    page = svc.client.get("/v1/alerts", params={"limit": 2, "sort": "newest"}, headers=svc.h("maintenance")).json()
    older = add_alert(svc, "pump-02", T0)  # opened before everything listed so far
    rest = svc.client.get(
        "/v1/alerts", params={"limit": 10, "cursor": page["next_cursor"], "sort": "newest"}, headers=svc.h("maintenance")
    ).json()
    assert [a["id"] for a in page["items"]] + [a["id"] for a in rest["items"]] == [ids_[3], ids_[2], ids_[1], ids_[0], older]
    assert rest["next_cursor"] is None


def test_detail_has_peak_span_channels_threshold_model_history(svc: Service):
    a = add_alert(svc, "pump-01", T0 + H, returned_at=T0 + 3 * H, severity="critical", peak=7.5)
    svc.client.post(f"/v1/alerts/{a}/notes", json={"note": "vibration probe checked"}, headers=svc.h("maintenance"))
    d = svc.client.get(f"/v1/alerts/{a}", headers=svc.h("maintenance")).json()
    man = svc.manifest()
    assert d["peak_score"] == 7.5 and d["severity"] == "critical"
    assert (d["opened_at"], d["returned_at"], d["duration_s"]) == ("2026-10-13T01:00:00Z", "2026-10-13T03:00:00Z", 7200.0)
    assert [c["channel"] for c in d["top_channels"]] == ["vibration_mm_s", "bearing_temp_c"]
    assert (d["model_id"], d["model_version"]) == (man.model_id, man.version)
    assert d["threshold"]["version"] == 1 and d["threshold"]["origin"] == "calibrated"
    assert d["threshold"]["warning"] == man.thresholds.warning
    assert d["threshold"]["on_delay_s"] == man.alert_rule.on_k * man.window_period_s
    assert [(e["kind"], e["actor"]) for e in d["history"]] == [("opened", "rule"), ("returned", "rule"), ("note", "maintenance-tester")]
    assert d["history"][2]["note"] == "vibration probe checked"
    r = svc.client.get("/v1/alerts/999", headers=svc.h("maintenance"))
    assert r.status_code == 404 and r.json()["error"]["field"] == "path.alert_id"


def test_acknowledge_close_and_invalid_transitions(svc: Service):
    a = add_alert(svc, "pump-01", T0 + H, returned_at=T0 + 2 * H)
    c, hm = svc.client, svc.h("maintenance")
    r = c.post(f"/v1/alerts/{a}/acknowledge", json={"note": "on my way"}, headers=hm)
    assert r.status_code == 200 and r.json()["state"] == "acknowledged"
    assert r.json()["acknowledged_by"] == "maintenance-tester"
    again = c.post(f"/v1/alerts/{a}/acknowledge", headers=hm)
    assert again.status_code == 409 and again.json()["error"]["details"]["state"] == "acknowledged"
    r = c.post(f"/v1/alerts/{a}/close", json={"outcome": "confirmed_fault", "note": "worn bearing"}, headers=hm)
    assert r.status_code == 200
    assert (r.json()["state"], r.json()["outcome"], r.json()["close_note"]) == ("closed", "confirmed_fault", "worn bearing")
    twice = c.post(f"/v1/alerts/{a}/close", json={"outcome": "false_alarm"}, headers=hm)
    assert twice.status_code == 409 and twice.json()["error"]["details"]["state"] == "closed"
    ack_closed = c.post(f"/v1/alerts/{a}/acknowledge", headers=hm)
    assert ack_closed.status_code == 409 and ack_closed.json()["error"]["details"]["state"] == "closed"
    assert alert_row(svc, a).outcome == "confirmed_fault"  # the refused close changed nothing
    bad = c.post(f"/v1/alerts/{a}/close", json={"outcome": "fixed"}, headers=hm)
    assert bad.status_code == 422 and bad.json()["error"]["field"] == "body.outcome"
    with svc.db.session() as s:
        kinds = [(e.kind, e.actor, e.note) for e in s.scalars(select(AlertEvent).where(AlertEvent.alert_id == a).order_by(AlertEvent.id))]
        audit = [(x.action, x.actor) for x in s.scalars(select(AuditLog).where(AuditLog.target == f"alert:{a}").order_by(AuditLog.id))]
    assert kinds[2:] == [("acknowledged", "maintenance-tester", "on my way"), ("closed", "maintenance-tester", "worn bearing")]
    assert audit == [("alert.acknowledged", "maintenance-tester"), ("alert.closed", "maintenance-tester")]


def test_closing_an_active_unacknowledged_alert(svc: Service):
    a = add_alert(svc, "pump-02", T0 + H)  # condition still active
    assert alert_row(svc, a).active_key == "pump-02"
    r = svc.client.post(f"/v1/alerts/{a}/close", json={"outcome": "planned_work"}, headers=svc.h("operator"))
    assert r.status_code == 200
    row = alert_row(svc, a)
    assert (row.state, row.condition, row.active_key) == ("closed", "active", None)  # the rule may open a new one
    assert row.acknowledged_by == "operator-tester"  # acknowledged implicitly
    history = svc.client.get(f"/v1/alerts/{a}", headers=svc.h("maintenance")).json()["history"]
    assert [e["kind"] for e in history] == ["opened", "acknowledged", "closed"]
    assert history[1]["details"] == {"implicit": True, "by": "close"}
    # Another alert for the same asset can now be opened (the UNIQUE active_key is free).
    b = add_alert(svc, "pump-02", T0 + 5 * H)
    assert alert_row(svc, b).active_key == "pump-02"


def test_notes_on_any_state_and_validation(svc: Service):
    a = add_alert(svc, "pump-01", T0 + H, returned_at=T0 + 2 * H)
    svc.client.post(f"/v1/alerts/{a}/close", json={"outcome": "false_alarm"}, headers=svc.h("maintenance"))
    r = svc.client.post(f"/v1/alerts/{a}/notes", json={"note": "sensor cable was loose"}, headers=svc.h("maintenance"))
    assert r.status_code == 201 and r.json()["kind"] == "note" and r.json()["actor"] == "maintenance-tester"
    blank = svc.client.post(f"/v1/alerts/{a}/notes", json={"note": ""}, headers=svc.h("maintenance"))
    assert blank.status_code == 422 and blank.json()["error"]["field"] == "body.note"
    extra = svc.client.post(f"/v1/alerts/{a}/notes", json={"note": "x", "colour": "red"}, headers=svc.h("maintenance"))
    assert extra.status_code == 422


def test_roles(svc: Service):
    a = add_alert(svc, "pump-01", T0 + H)
    c = svc.client
    assert c.get("/v1/alerts").status_code == 401
    assert c.get("/v1/alerts", headers={"Authorization": "Bearer ew_wrong"}).status_code == 401
    assert c.get("/v1/alerts", headers=svc.h("machine")).status_code == 403
    assert c.post(f"/v1/alerts/{a}/acknowledge", headers=svc.h("machine")).status_code == 403
    assert c.post(f"/v1/alerts/{a}/close", json={"outcome": "unknown"}, headers=svc.h("machine")).status_code == 403
    assert alert_row(svc, a).state == "unacknowledged"
    for role in ("maintenance", "operator", "admin"):
        assert c.get(f"/v1/alerts/{a}", headers=svc.h(role)).status_code == 200


def test_concurrent_actions_on_one_alert_apply_once(svc: Service):
    """Parallel requests: the state check and change are one transaction, so one wins."""
    from concurrent.futures import ThreadPoolExecutor

    a = add_alert(svc, "pump-01", T0 + H, returned_at=T0 + 2 * H)
    hm = svc.h("maintenance")
    with ThreadPoolExecutor(max_workers=4) as pool:
        acks = list(pool.map(lambda _: svc.client.post(f"/v1/alerts/{a}/acknowledge", headers=hm).status_code, range(4)))
        closes = list(
            pool.map(lambda o: svc.client.post(f"/v1/alerts/{a}/close", json={"outcome": o}, headers=hm).status_code,
                     ["confirmed_fault", "false_alarm", "unknown", "planned_work"])
        )
    assert sorted(acks) == [200, 409, 409, 409] and sorted(closes) == [200, 409, 409, 409]
    with svc.db.session() as s:
        kinds = [e.kind for e in s.scalars(select(AlertEvent).where(AlertEvent.alert_id == a))]
    assert kinds.count("acknowledged") == 1 and kinds.count("closed") == 1
