"""Notifications end to end in one process: routes through the admin API and the CLI,
outbox rows written with the alert transitions, delivered by the sender's round
(service.notifier.run_once, called here directly; the background loop is off) to a real
local webhook receiver and a real local SMTP server (aiosmtpd), with retries, backoff,
dead letters, leases and reminders. The signature check is the receiver's own, as the
README gives it (HMAC-SHA256, RFC 2104)."""

from __future__ import annotations

import hashlib
import hmac
import shutil
from datetime import datetime, timedelta, timezone

import pytest
from sqlalchemy import select

from alerts_support import T0, Service, add_alert, add_asset, running
from notify_support import self_signed, smtp_sink, webhook_receiver
from service.db import outbox, rule_alerts
from service.db.ingest_sql import AlertRow
from service.db.models import NotifyOutbox
from service.notifier import run_once
from service.notify_channels import signature, verify

SECRET = "s3cret-for-the-test-receiver"
H = timedelta(hours=1)


@pytest.fixture()
def sink():
    with smtp_sink() as s:
        yield s


@pytest.fixture()
def svc(tmp_path, sink):
    with running(
        tmp_path, notify_enabled=False, smtp_host=sink.host, smtp_port=sink.port, smtp_from="kilter@plant.example",
        notify_backoff_s=30.0, notify_max_attempts=3, notify_unack_after_min=30.0, notify_timeout_s=5.0, notify_lease_s=20.0,
        public_url="https://kilter.plant.example",
    ) as s:
        add_asset(s, "pump-01")
        add_asset(s, "pump-02")
        yield s


def add_route(svc: Service, **body) -> dict:
    r = svc.client.post("/v1/notify/routes", json=body, headers=svc.h("admin"))
    assert r.status_code == 201, r.text
    return r.json()


def rows(svc: Service) -> list[NotifyOutbox]:
    with svc.db.session() as s:
        return list(s.scalars(select(NotifyOutbox).order_by(NotifyOutbox.id)))


def escalate_and_return(svc: Service, alert_id: int, at: datetime) -> None:
    """The rule's two further transitions, written as ingest writes them."""
    with svc.db.transaction() as s:
        conn = s.connection()
        alert = AlertRow(alert_id, "warning", at, 3.0, at, [{"channel": "vibration_mm_s", "share": 0.6}], active_key="pump-01")
        rule_alerts.escalate_alert(conn, alert, at=at, details={})
        rule_alerts.return_alert(conn, alert, at=at + H, details={})


def test_each_transition_is_delivered_once_signed_to_its_routes(svc: Service, sink) -> None:
    with webhook_receiver(SECRET) as hook:
        web = add_route(svc, name="ops-hook", channel="webhook", target=hook.url, secret=SECRET)
        mail = add_route(svc, name="pump-01-critical", channel="email", target="shift@plant.example, lead@plant.example",
                         asset_id="pump-01", min_severity="critical", events=["escalated", "returned", "unacknowledged"])
        assert web["secret"] == SECRET and mail["secret"] is None
        a1 = add_alert(svc, "pump-01", T0)
        escalate_and_return(svc, a1, T0 + H)
        a2 = add_alert(svc, "pump-02", T0 + 2 * H, severity="critical")
        queued = {(r.route_id, r.alert_id, r.kind) for r in rows(svc)}
        assert queued == {
            (web["id"], a1, "opened"), (web["id"], a1, "escalated"), (web["id"], a1, "returned"), (web["id"], a2, "opened"),
            (mail["id"], a1, "escalated"), (mail["id"], a1, "returned"),  # pump-01 only, once critical
        }
        done = run_once(svc.db, svc.app.state.settings, owner="sender-a")
        assert (done.sent, done.retried, done.dead) == (6, 0, 0)
        again = run_once(svc.db, svc.app.state.settings, owner="sender-b")
        assert again.sent == 0
        assert all(r.status == "sent" and r.attempts == 1 for r in rows(svc))

    assert len(hook.deliveries) == 4 and all(d.signature_ok for d in hook.deliveries)
    assert sorted(d.json["event"] for d in hook.deliveries) == ["escalated", "opened", "opened", "returned"]
    first = hook.deliveries[0]
    assert first.key == first.json["idempotency_key"] == f"alert-{a1}-opened-route-{web['id']}"
    assert first.json["url"] == f"https://kilter.plant.example/alerts/{a1}" and first.json["alert"]["asset_id"] == "pump-01"
    # The receiver's check, written out as the README gives it (RFC 2104 HMAC with SHA-256).
    ts = first.headers["kilter-timestamp"]
    mac = hmac.new(SECRET.encode(), ts.encode() + b"." + first.body, hashlib.sha256).hexdigest()
    assert hmac.compare_digest(first.headers["kilter-signature"], "v1=" + mac)
    # A tampered body, another secret or an old timestamp all fail.
    assert not verify(SECRET, ts, first.body.replace(b"pump-01", b"pump-09"), first.headers["kilter-signature"])
    assert not verify("another-secret-entirely", ts, first.body, first.headers["kilter-signature"])
    old = str(int(ts) - 3600)
    assert not verify(SECRET, old, first.body, signature(SECRET, int(old), first.body))

    assert len(sink.messages) == 2
    assert sorted(sink.message_ids()) == sorted(f"<alert-{a1}-{k}-route-{mail['id']}@kilter>" for k in ("escalated", "returned"))
    assert sink.envelopes[0] == ("kilter@plant.example", ["shift@plant.example", "lead@plant.example"])
    text = sink.messages[0].get_payload()
    assert f"https://kilter.plant.example/alerts/{a1}" in text and "lock-out" in text


def test_failures_back_off_then_dead_letter_and_an_admin_can_retry(svc: Service) -> None:
    settings = svc.app.state.settings
    with webhook_receiver(SECRET, statuses=[503, 500]) as hook:
        flaky = add_route(svc, name="flaky", channel="webhook", target=hook.url, secret=SECRET, events=["opened"])
        add_alert(svc, "pump-01", T0)
        now = datetime.now(timezone.utc)
        assert run_once(svc.db, settings, owner="a", now=now).retried == 1
        (row,) = rows(svc)
        assert row.status == "pending" and row.attempts == 1 and "503" in row.last_error
        assert row.next_attempt_at == pytest.approx(now + timedelta(seconds=30), abs=timedelta(seconds=1))
        assert run_once(svc.db, settings, owner="a", now=now + timedelta(seconds=29)).retried == 0  # not due yet
        assert run_once(svc.db, settings, owner="a", now=now + timedelta(seconds=31)).retried == 1
        (row,) = rows(svc)
        # Backoff doubles: 30 s after the first failure, 60 s after the second.
        assert row.next_attempt_at == pytest.approx(now + timedelta(seconds=91), abs=timedelta(seconds=1))
        assert run_once(svc.db, settings, owner="a", now=now + timedelta(seconds=92)).sent == 1
        assert [d.key for d in hook.deliveries] == [row.idempotency_key] * 3  # one key across the attempts
    svc.client.put(f"/v1/notify/routes/{flaky['id']}/enabled", json={"enabled": False}, headers=svc.h("admin"))

    with webhook_receiver(SECRET, statuses=[500] * 10) as down, webhook_receiver(SECRET, statuses=[404]) as gone:
        add_route(svc, name="down", channel="webhook", target=down.url, secret=SECRET, events=["opened"])
        add_route(svc, name="gone", channel="webhook", target=gone.url, secret=SECRET, events=["opened"])
        add_alert(svc, "pump-02", T0 + H)
        t = datetime.now(timezone.utc)
        for step in range(3):
            run_once(svc.db, settings, owner="a", now=t + timedelta(hours=step))
        by_route = {r.route_id: r for r in rows(svc) if r.alert_id is not None and r.kind == "opened" and r.status != "sent"}
        assert sorted((r.status, r.attempts) for r in by_route.values()) == [("dead", 1), ("dead", 3)]  # 404 at once; 500 x3
        assert len(gone.deliveries) == 1 and len(down.deliveries) == 3
        dead = next(r for r in by_route.values() if r.attempts == 3)
        listed = svc.client.get("/v1/notify/outbox", params={"status": "dead"}, headers=svc.h("admin")).json()["items"]
        assert {m["id"] for m in listed} == {r.id for r in by_route.values()}
        r = svc.client.post(f"/v1/notify/outbox/{dead.id}/retry", headers=svc.h("admin"))
        assert r.status_code == 200 and r.json()["status"] == "pending" and r.json()["attempts"] == 0
        assert svc.client.post(f"/v1/notify/outbox/{dead.id}/retry", headers=svc.h("admin")).status_code == 409


def test_a_claim_holds_a_lease_that_only_running_out_hands_on(svc: Service) -> None:
    with webhook_receiver(SECRET) as hook:
        add_route(svc, name="hook", channel="webhook", target=hook.url, secret=SECRET, events=["opened"])
        add_alert(svc, "pump-01", T0)
        now = datetime.now(timezone.utc)
        with svc.db.transaction() as s:
            held = outbox.claim_one(s, owner="sender-a", lease_s=20, now=now)
        assert held is not None and held.attempts == 1
        with svc.db.transaction() as s:  # a second sender finds nothing while the lease runs
            assert outbox.claim_one(s, owner="sender-b", lease_s=20, now=now + timedelta(seconds=19)) is None
        with svc.db.transaction() as s:  # sender-a died: the lease ran out, sender-b takes it, same key
            taken = outbox.claim_one(s, owner="sender-b", lease_s=20, now=now + timedelta(seconds=21))
        assert taken is not None and taken.idempotency_key == held.idempotency_key and taken.attempts == 2
        with svc.db.transaction() as s:
            assert not outbox.mark_sent(s, row_id=held.id, owner="sender-a")  # the old holder cannot mark it
            assert outbox.mark_sent(s, row_id=taken.id, owner="sender-b")


def test_backfilled_alerts_and_routes_turned_off_send_nothing(svc: Service) -> None:
    with webhook_receiver(SECRET) as hook:
        route = add_route(svc, name="hook", channel="webhook", target=hook.url, secret=SECRET)
        alert_id = add_alert(svc, "pump-01", T0)
        with svc.db.transaction() as s:
            row = AlertRow(alert_id, "critical", T0, 3.0, T0, [], active_key="pump-01")
            row.backfilled = True  # type: ignore[attr-defined]  # as a backfill marks the alerts it opens
            assert outbox.enqueue_transition(s.connection(), "escalated", row, at=T0) == 0
        r = svc.client.put(f"/v1/notify/routes/{route['id']}/enabled", json={"enabled": False}, headers=svc.h("admin"))
        assert r.status_code == 200 and r.json()["enabled"] is False
        add_alert(svc, "pump-02", T0)
        assert [(x.alert_id, x.kind) for x in rows(svc)] == [(alert_id, "opened")]
        assert run_once(svc.db, svc.app.state.settings, owner="a").sent == 0  # queued before, waits while off


def test_reminder_once_when_still_unacknowledged_after_n_minutes(svc: Service) -> None:
    settings = svc.app.state.settings
    with webhook_receiver(SECRET) as hook:
        add_route(svc, name="hook", channel="webhook", target=hook.url, secret=SECRET, events=["opened", "unacknowledged"])
        waiting = add_alert(svc, "pump-01", T0)
        seen = add_alert(svc, "pump-02", T0)
        assert svc.client.post(f"/v1/alerts/{seen}/acknowledge", headers=svc.h("maintenance")).status_code == 200
        now = datetime.now(timezone.utc)
        assert run_once(svc.db, settings, owner="a", now=now).sent == 2
        assert run_once(svc.db, settings, owner="a", now=now + timedelta(minutes=29)).reminders == 0
        later = run_once(svc.db, settings, owner="a", now=now + timedelta(minutes=31))
        assert (later.reminders, later.sent) == (1, 1)
        assert run_once(svc.db, settings, owner="b", now=now + timedelta(minutes=90)).reminders == 0  # once per alert and route
    reminder = hook.deliveries[-1].json
    assert reminder["event"] == "unacknowledged" and reminder["alert"]["id"] == waiting and hook.deliveries[-1].signature_ok


def test_routes_are_for_admins_and_bad_input_names_the_field(svc: Service) -> None:
    c = svc.client
    body = {"name": "x", "channel": "webhook", "target": "http://127.0.0.1:9/h"}
    assert c.post("/v1/notify/routes", json=body, headers=svc.h("operator")).status_code == 403
    assert c.get("/v1/notify/routes", headers=svc.h("maintenance")).status_code == 403
    for bad, field in [
        ({**body, "channel": "pager"}, "body.channel"),
        ({**body, "target": "ftp://x"}, "body.target"),
        ({**body, "channel": "email", "target": "not-an-address"}, "body.target"),
        ({**body, "events": ["closed"]}, "body.events[0]"),
        ({**body, "secret": "short"}, "body.secret"),
    ]:
        r = c.post("/v1/notify/routes", json=bad, headers=svc.h("admin"))
        assert r.status_code == 422 and r.json()["error"]["field"] == field, (bad, r.text)
    assert c.post("/v1/notify/routes", json=body, headers=svc.h("admin")).status_code == 201
    assert c.post("/v1/notify/routes", json=body, headers=svc.h("admin")).status_code == 409  # name taken
    assert [r["name"] for r in c.get("/v1/notify/routes", headers=svc.h("admin")).json()["items"]] == ["x"]


def test_test_message_through_api_and_cli(svc: Service, sink, monkeypatch, capsys) -> None:
    from service.cli import main

    with webhook_receiver(SECRET) as hook:
        route = add_route(svc, name="hook", channel="webhook", target=hook.url, secret=SECRET)
        assert svc.client.post(f"/v1/notify/routes/{route['id']}/test", headers=svc.h("admin")).status_code == 202
        monkeypatch.setenv("KILTER_DATABASE_URL", svc.app.state.settings.database_url)
        monkeypatch.setenv("KILTER_MODEL_DIR", str(svc.app.state.settings.model_dir))
        assert main(["notify", "add-email", "--name", "desk", "--to", "desk@plant.example", "--events", "opened"]) == 0
        assert main(["notify", "list"]) == 0
        out = capsys.readouterr().out
        assert "desk\temail\tdesk@plant.example\tevery asset\twarning+\topened\ton" in out
        email_id = int(out.splitlines()[-1].split("\t")[0])
        assert main(["notify", "test", str(email_id)]) == 0
        assert main(["notify", "add-webhook", "--name", "bad", "--url", "gopher://x"]) == 2
        assert "http:// or https://" in capsys.readouterr().err
        assert run_once(svc.db, svc.app.state.settings, owner="a").sent == 2
    assert [d.json["event"] for d in hook.deliveries] == ["test"] and hook.deliveries[0].signature_ok
    assert len(sink.messages) == 1 and "test message for route 'desk'" in sink.messages[0]["Subject"]


@pytest.mark.skipif(shutil.which("openssl") is None, reason="the openssl command makes the relay's test certificate")
def test_email_over_starttls_with_a_login_and_a_refused_login(tmp_path) -> None:
    """KILTER_SMTP_STARTTLS with the relay's CA file, user and password (RFC 3207 STARTTLS,
    then AUTH); a wrong password is final (dead-lettered at once), not retried."""
    cert, key = self_signed(tmp_path)
    with smtp_sink(tls=(cert, key), users={"kilter": "relay-pass-1"}) as relay:
        for password, want in (("relay-pass-1", "sent"), ("wrong-pass", "dead")):
            folder = tmp_path / want
            folder.mkdir()
            with running(folder, notify_enabled=False, smtp_host=relay.host, smtp_port=relay.port, smtp_starttls=True,
                         smtp_ca_file=cert, smtp_user="kilter", smtp_password=password, smtp_from="kilter@plant.example") as svc:
                add_asset(svc, "pump-01")
                add_route(svc, name="desk", channel="email", target="desk@plant.example", events=["opened"])
                add_alert(svc, "pump-01", T0)
                run_once(svc.db, svc.app.state.settings, owner="a")
                (row,) = rows(svc)
                assert row.status == want and row.attempts == 1, row.last_error
                if want == "dead":
                    assert "login refused" in row.last_error
    assert len(relay.messages) == 1 and relay.envelopes == [("kilter@plant.example", ["desk@plant.example"])]


def test_two_senders_side_by_side_send_each_message_once(svc: Service) -> None:
    """Two senders (as two workers or replicas would run) drain one outbox together: the
    database's claim gives each message to one of them."""
    from collections import Counter
    from concurrent.futures import ThreadPoolExecutor

    with webhook_receiver(SECRET) as hook:
        add_route(svc, name="hook", channel="webhook", target=hook.url, secret=SECRET)
        for i in range(6):
            add_alert(svc, "pump-01", T0 + i * H, returned_at=T0 + i * H + timedelta(minutes=20))
        assert len(rows(svc)) == 12  # opened and returned, six times
        with ThreadPoolExecutor(max_workers=2) as pool:
            results = list(pool.map(lambda owner: run_once(svc.db, svc.app.state.settings, owner=owner), ["w1", "w2"]))
    assert sum(r.sent for r in results) == 12 and all(r.lost_lease == 0 for r in results)
    assert Counter(hook.keys()) == Counter({r.idempotency_key: 1 for r in rows(svc)})
