"""A person closing an alert while an ingest request runs the alert rule on it.

The rule's persistence locks the active alert it reads (FOR UPDATE on PostgreSQL; SQLite's
write transaction) and writes back only the columns it owns, so the close is never undone:
the alert stays closed, frees the asset's active slot, and the next high windows open a new
alert. Runs on SQLite and, with KILTER_TEST_DATABASE_URL, on PostgreSQL.
"""

from __future__ import annotations

import threading

from readings_support import readings
from service.db import alerts as alert_q
from service.db import rule_alerts
from service.db.session import Database


def test_a_close_during_ingest_stays_closed_and_the_next_high_windows_open_a_new_alert(env, monkeypatch) -> None:
    r = env.post("pump-01", readings(range(12), 3.0)).json()
    assert r["alerts_opened"] == 1
    (alert_id,) = [row[0] for row in env.rows("SELECT id FROM alerts")]

    closer_db = Database(env.settings.database_url)  # another client of the database, as another worker would be
    outcome: list[object] = []

    def close_now() -> None:
        try:
            with closer_db.transaction() as s:
                alert_q.close(s, alert_id=alert_id, actor="maintainer", outcome="false_alarm", note="checked on site")
            outcome.append("closed")
        except Exception as e:  # noqa: BLE001 - reported below
            outcome.append(e)

    real_extend = rule_alerts.extend_alert
    closer = threading.Thread(target=close_now)

    def extend_while_a_person_closes(alert, **kw):
        # The rule has read the active alert; a person closes it now, from another connection.
        # The close waits for the rule's lock (up to a second here), or commits if nothing locks.
        if not closer.is_alive() and not outcome:
            closer.start()
            closer.join(timeout=1.0)
        return real_extend(alert, **kw)

    monkeypatch.setattr(rule_alerts, "extend_alert", extend_while_a_person_closes)
    try:
        r = env.post("pump-01", readings(range(12, 16), 3.0)).json()
        closer.join(timeout=10)
    finally:
        closer_db.dispose()
    assert outcome == ["closed"], outcome
    assert r["alerts_opened"] == 0
    state, active_key, returned = env.rows("SELECT state, active_key, condition FROM alerts WHERE id = ?", alert_id)[0]
    assert (state, active_key) == ("closed", None), (state, active_key, returned)

    monkeypatch.setattr(rule_alerts, "extend_alert", real_extend)
    r = env.post("pump-01", readings(range(16, 22), 3.0)).json()
    assert r["alerts_opened"] == 1
    rows = env.rows("SELECT id, state, active_key FROM alerts ORDER BY id")
    assert rows[0] == (alert_id, "closed", None)
    assert rows[1][1:] == ("unacknowledged", "pump-01")
