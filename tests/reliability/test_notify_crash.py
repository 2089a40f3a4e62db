"""Notifications across a crash: a real `kilter serve` (bundled model) replays the demo
day (all six pumps) with a signed webhook route and an e-mail route set up through
`kilter notify`, a real local webhook receiver and a real local SMTP server (aiosmtpd).
The receiver holds the first delivery unanswered; the service is SIGKILLed while that
delivery is in flight, restarted, and the replay finished (a resend is idempotent).

Afterwards every alert transition the rule stored (opened, escalated, returned) has
exactly one message per matching route once repeats are dropped by idempotency key, as the
README tells receivers to; the one in flight at the kill is the only key that arrived
twice; every delivery's signature checks; no message is left unsent or dead; each e-mail
arrived once (Message-ID from the key). The counts are printed; a delivered body and its
signature check are printed with -s.

Bounded: one kill, deadlines on every wait; loopback only; the server is stopped whatever happens.
"""

from __future__ import annotations

import hashlib
import hmac
import subprocess
import threading
import time
from collections import Counter
from pathlib import Path

import support
from notify_support import smtp_sink, webhook_receiver
from support import Server

from service.replay import AssetSeries, ReplayError, replay

SECRET = "crash-test-signing-secret-0123456789"
DEADLINE_S = 120.0


def _kilter(env: dict[str, str], cwd: Path, *args: str) -> str:
    done = subprocess.run([support.KILTER, *args], env=env, cwd=cwd, capture_output=True, text=True, timeout=60)
    assert done.returncode == 0, done.stderr
    return done.stdout


def _replay(url: str, key: str, day, retries: int) -> str:
    series = {a: AssetSeries(day.times_s[a], day.values[a]) for a in day.times_s}
    try:
        return replay(url=url, key=key, channels=day.channels, series=series, batch=120, retries=retries, progress=False).line()
    except ReplayError as e:
        return f"stopped: {e}"


def test_one_message_per_transition_across_a_sigkill_mid_delivery(tmp_path: Path) -> None:
    from training import demo_data

    url = f"sqlite:///{tmp_path / 'notify.db'}"
    keys = support.prepare_database(url, {"machine": "m", "admin": "a"})
    start_s = (time.time() // 60) * 60 - 86400.0  # the day ends now: the service refuses future readings
    day = demo_data.demo_day(start=start_s)

    with webhook_receiver(SECRET, hold=True) as hook, smtp_sink() as sink:
        env = support.server_env(
            url, support.REPO / "models",
            KILTER_NOTIFY_POLL_S="0.2", KILTER_NOTIFY_TIMEOUT_S="4", KILTER_NOTIFY_LEASE_S="9",
            KILTER_NOTIFY_UNACK_AFTER_MIN="0", KILTER_NOTIFY_BACKOFF_S="1",
            KILTER_SMTP_HOST=sink.host, KILTER_SMTP_PORT=str(sink.port), KILTER_SMTP_FROM="kilter@plant.example",
        )
        secret_out = _kilter(env, tmp_path, "notify", "add-webhook", "--name", "ops-hook", "--url", hook.url, "--secret", SECRET)
        assert secret_out.strip() == SECRET
        _kilter(env, tmp_path, "notify", "add-email", "--name", "crit-mail", "--to", "shift@plant.example", "--min-severity", "critical")
        routes = dict(support.query(url, "SELECT name, id FROM notify_routes"))

        server = Server(env, tmp_path)
        deadline = time.monotonic() + DEADLINE_S
        first_replay: list[str] = []
        try:
            server.start()
            feeder = threading.Thread(target=lambda: first_replay.append(_replay(server.url, keys["machine"], day, retries=1)), daemon=True)
            feeder.start()
            assert hook.arrived.wait(timeout=DEADLINE_S), "no notification reached the receiver"
            server.kill()  # the first delivery was received and is unanswered: killed mid-delivery
            in_flight = hook.deliveries[0].key
            hook.release.set()
            feeder.join(timeout=60)
            server.start()
            second_replay = _replay(server.url, keys["machine"], day, retries=6)
            while time.monotonic() < deadline:
                left = support.query(url, "SELECT COUNT(*) FROM notify_outbox WHERE status <> 'sent'")[0][0]
                if left == 0:
                    break
                time.sleep(0.3)
        finally:
            server.stop()

    events = support.query(url, """
        SELECT e.alert_id, e.kind, a.severity, e.details FROM alert_events e JOIN alerts a ON a.id = e.alert_id
        WHERE e.kind IN ('opened', 'escalated', 'returned') ORDER BY e.id""")
    webhook_keys = {f"alert-{a}-{kind}-route-{routes['ops-hook']}" for a, kind, _sev, _d in events}
    critical_keys = set()
    for a, kind, severity, details in events:
        opened_as = (details if isinstance(details, dict) else __import__("json").loads(details or "{}")).get("severity")
        if (kind == "opened" and opened_as == "critical") or kind == "escalated" or (kind == "returned" and severity == "critical"):
            critical_keys.add(f"alert-{a}-{kind}-route-{routes['crit-mail']}")
    outbox = support.query(url, "SELECT idempotency_key, status, attempts FROM notify_outbox")
    arrivals = Counter(hook.keys())
    counts = {
        "transitions stored": len(events),
        "outbox rows": len(outbox),
        "webhook deliveries (raw)": sum(arrivals.values()),
        "webhook keys (repeats dropped)": len(arrivals),
        "keys delivered twice": sum(1 for n in arrivals.values() if n > 1),
        "e-mails": len(sink.messages),
        "first replay": first_replay[0] if first_replay else "-",
        "second replay": second_replay,
    }
    print("\nnotification crash counts:\n" + "\n".join(f"  {k:32s} {v}" for k, v in counts.items()))
    sample = hook.unique()[in_flight]
    ts = sample.headers["kilter-timestamp"]
    mac = hmac.new(SECRET.encode(), ts.encode() + b"." + sample.body, hashlib.sha256).hexdigest()
    print(f"  delivered body: {sample.body.decode()}")
    print(f"  Kilter-Timestamp: {ts}\n  Kilter-Signature: {sample.headers['kilter-signature']}\n  recomputed:       v1={mac}")

    assert len(events) >= 4, "the demo day should open and return at least two alerts"
    assert all(status == "sent" for _k, status, _n in outbox), outbox
    assert {k for k, _s, _n in outbox} == webhook_keys | critical_keys  # one row per transition and matching route
    # Exactly one message per transition once repeats are dropped; only the one in flight repeated.
    assert set(arrivals) == webhook_keys
    assert arrivals[in_flight] == 2 and all(n == 1 for k, n in arrivals.items() if k != in_flight)
    assert all(d.signature_ok for d in hook.deliveries)
    assert hmac.compare_digest(sample.headers["kilter-signature"], "v1=" + mac)  # RFC 2104 HMAC-SHA256, by hand
    assert sorted(sink.message_ids()) == sorted(f"<{k}@kilter>" for k in critical_keys)
