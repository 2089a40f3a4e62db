"""Retention: readings, window scores and gap records older than the setting are pruned in
the background; alerts, their events, thresholds and the audit log are kept."""

from __future__ import annotations

import time

from readings_support import reading, readings
from service_env import start_env


def test_readings_older_than_the_retention_horizon_are_refused(tmp_path, tiny_dir) -> None:
    """Retention prunes by reading time, so a reading already past the horizon would be
    accepted and then silently deleted: it is a 422 naming it, and nothing of the batch is stored."""
    gen = start_env(tmp_path, tiny_dir, retention_days=30)
    env = next(gen)
    try:
        recent_t0 = int(time.time()) // 120 * 120 - 3600
        batch = [reading(i, t0=recent_t0, jitter_s=0) for i in range(5)] + readings(range(3))  # the last three: 2026-10-01
        r = env.post("pump-01", batch)
        assert r.status_code == 422, r.text
        err = r.json()["error"]
        assert err["field"] == "body.readings[5].ts" and "retention horizon" in err["message"]
        assert "2026-10-01T00:00" in err["message"] and "KILTER_RETENTION_DAYS=30" in err["message"]
        assert env.count("readings") == 0 and env.count("assets") == 0
        assert env.post("pump-01", batch[:5]).status_code == 200
    finally:
        gen.close()


def test_background_pruning_keeps_alerts_and_audit(tmp_path, tiny_dir) -> None:
    from datetime import datetime, timezone

    import service.ingest as ingest_module
    from service.api.deps import Caller

    gen = start_env(tmp_path, tiny_dir, retention_days=30, retention_interval_s=0.2)
    env = next(gen)
    try:
        # Old data (2026-10-01) with an alert and a gap, stored back when it was recent (the
        # ingest call's own clock), then aged past the horizon: the pruner removes it.
        state = env.client.app.state
        rows = readings([*range(12), *range(16, 30)], 3.0)
        old = ingest_module.ingest(
            db=state.db, registry=state.registry, settings=env.settings, metrics=state.metrics,
            caller=Caller(0, "station", "machine", None), asset_id="pump-01",
            readings=[ingest_module.RawReading(r["ts"], r["values"]) for r in rows], now=datetime(2026, 10, 1, 1, tzinfo=timezone.utc),
        )
        assert old.accepted == 26 and old.alerts_opened == 1 and old.gap_windows > 0
        recent_t0 = int(time.time()) // 120 * 120 - 3600
        env.post("pump-02", [reading(i, t0=recent_t0, jitter_s=0) for i in range(20)])
        deadline = time.monotonic() + 20
        while env.count("readings", "asset_id='pump-01'") and time.monotonic() < deadline:
            time.sleep(0.1)
        assert env.count("readings", "asset_id='pump-01'") == 0
        assert env.count("window_scores", "asset_id='pump-01'") == 0
        assert env.count("skipped_windows") == 0
        # Kept: the recent asset's data, every alert with its events, thresholds, audit.
        assert env.count("readings", "asset_id='pump-02'") == 20
        assert env.count("window_scores", "asset_id='pump-02'") > 0
        assert env.count("alerts") == 1 and env.count("alert_events") >= 1
        assert env.count("threshold_versions") == 2 and env.count("audit_log") >= 4
        metrics = env.client.get("/metrics").text
        assert 'kilter_retention_pruned_rows_total{table="readings"} 26' in metrics
    finally:
        gen.close()


def test_shutdown_waits_for_a_running_prune_before_closing_the_database(tmp_path, tiny_dir, monkeypatch) -> None:
    """The prune thread holds a pooled connection; the database must be disposed only after it
    is back (a connection handed back to a disposed pool is never closed: psycopg warns when
    it is collected). The prunes here are made slow and back to back, and the service is
    stopped just after one has begun."""
    import threading

    import service.db.readings as readings_module

    real_prune = readings_module.prune
    begun, order = threading.Event(), []

    def slow_prune(session, *, before):
        begun.set()
        time.sleep(0.4)
        removed = real_prune(session, before=before)
        order.append("prune finished")
        return removed

    monkeypatch.setattr(readings_module, "prune", slow_prune)
    gen = start_env(tmp_path, tiny_dir, retention_days=30, retention_interval_s=0.01)
    env = next(gen)
    db = env.client.app.state.db
    real_dispose = db.dispose

    def dispose():
        order.append("database disposed")
        real_dispose()

    db.dispose = dispose
    try:
        begun.clear()
        assert begun.wait(10), "no prune began"
    finally:
        gen.close()  # the lifespan's end, while that prune sleeps
    assert order[-2:] == ["prune finished", "database disposed"], order
