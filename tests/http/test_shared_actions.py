"""The dashboard and the API act through the same functions (service/actions.py): the same
row locks, checks and audit trail, whichever front end a person uses."""

from __future__ import annotations

import threading
import time
from typing import Any

from sqlalchemy import insert, literal, select, text

from service.db.models import ThresholdVersion
from service.db.session import make_engine
from test_web_pages import csrf, open_alert, sign_in  # noqa: E402  (tests/http is on sys.path)

Env = Any


def test_a_dashboard_close_and_an_api_close_of_one_alert_give_one_close_and_one_conflict(env: Env) -> None:
    alert_id = open_alert(env)
    sign_in(env, "maintenance")
    token = csrf(env)
    start = threading.Barrier(2)
    got: dict[str, Any] = {}

    def dashboard() -> None:
        start.wait()
        got["dashboard"] = env.client.post(f"/alerts/{alert_id}/close", data={"outcome": "false_alarm", "csrf_token": token},
                                           follow_redirects=False)

    def api() -> None:
        start.wait()
        got["api"] = env.client.post(f"/v1/alerts/{alert_id}/close", json={"outcome": "confirmed_fault"}, headers=env.auth("maintenance"))

    threads = [threading.Thread(target=f) for f in (dashboard, api)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=30)
    codes = {k: r.status_code for k, r in got.items()}
    assert sorted(codes.values()) in ([200, 409], [303, 409]), codes
    loser = "api" if codes["api"] == 409 else "dashboard"
    assert "is closed: it cannot be closed again" in got[loser].text
    (outcome,) = env.rows("SELECT outcome FROM alerts WHERE id = ?", alert_id)[0]
    assert outcome == ("false_alarm" if loser == "api" else "confirmed_fault")
    assert env.count("alert_events", "alert_id = ? AND kind = 'closed'", alert_id) == 1
    assert env.count("audit_log", "action = 'alert.closed'") == 1


def test_a_dashboard_threshold_change_waits_for_the_assets_row_lock(env: Env) -> None:
    """Another transaction holds pump-01's row lock (as the API's PUT /threshold does while it
    writes): the dashboard's change waits for it, then makes the next version; it does not
    race past the lock for the same version number."""
    open_alert(env)
    sign_in(env, "operator")
    token = csrf(env)
    engine = make_engine(env.settings.database_url)
    done = threading.Event()
    got: dict[str, Any] = {}

    def dashboard() -> None:
        got["r"] = env.client.post("/assets/pump-01/thresholds", data={"warning": "5", "reason": "quieter after overhaul", "confirm_short_history": "1", "csrf_token": token},
                                   follow_redirects=False)
        done.set()

    tv = ThresholdVersion.__table__
    cols = [c for c in tv.columns if c.name != "id"]
    copy_as_v2 = insert(tv).from_select(
        [c.name for c in cols],
        select(*[literal(2).label("version") if c.name == "version" else c for c in cols]).where(tv.c.asset_id == "pump-01", tv.c.version == 1),
    )
    try:
        with engine.connect() as holder:
            holder.begin()
            if engine.dialect.name != "sqlite":  # SQLite: the insert takes the database's write lock
                holder.execute(text("SELECT asset_id FROM assets WHERE asset_id = 'pump-01' FOR UPDATE"))
            holder.execute(copy_as_v2)  # the other change writes version 2 under the lock
            worker = threading.Thread(target=dashboard)
            worker.start()
            finished_while_locked = done.wait(timeout=1.0)
            holder.commit()
        worker.join(timeout=30)
    finally:
        engine.dispose()
    assert not finished_while_locked, f"the dashboard changed the threshold past the asset's row lock: {got}"
    assert got["r"].status_code == 303, got["r"].text  # not 409 "another change made version 2 at the same moment"
    versions = env.rows("SELECT version, warning, created_by FROM threshold_versions WHERE asset_id = 'pump-01' ORDER BY version DESC")
    assert [v[0] for v in versions] == [3, 2, 1] and versions[0] == (3, 5.0, "test-operator")
