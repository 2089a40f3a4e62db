"""Crash safety: a real `kilter serve` on 127.0.0.1 under concurrent ingest with
retrying clients, killed with SIGKILL at random moments and restarted, at least 10 times.

Afterwards: every reading whose POST got a 2xx is stored exactly once, the stored readings
are exactly what the clients sent (nothing torn, nothing invented), every due window is
scored exactly once, the alerts are exactly those the alert rule opens over the stored
scores replayed from scratch (so none duplicated, none lost), at most one is active per
asset, and the SQLite file passes PRAGMA integrity_check. The counts are printed.

Bounded: a fixed number of kill cycles and a deadline; loopback only; the server is
stopped at the end whatever happens.
"""

from __future__ import annotations

import random
import threading
import time
from collections import Counter
from pathlib import Path

import support
from support import Server

KILL_CYCLES = 10
ASSETS = ("crash-a", "crash-b", "crash-c")
BATCH = 20
READINGS_PER_ASSET = 2400  # more than the clients can send before the kill cycles end
DEADLINE_S = 150.0


def test_sigkill_cycles_lose_and_duplicate_nothing(tmp_path: Path) -> None:
    model_dir = support.build_model(tmp_path / "models")
    db_path = tmp_path / "crash.db"
    url = f"sqlite:///{db_path}"
    keys = support.prepare_database(url)
    server = Server(support.server_env(url, model_dir), tmp_path)
    rng = random.Random(20261201)
    start = support.aligned_start(hours_back=READINGS_PER_ASSET / 60 + 1)
    sent = {}
    targets = []
    for n, asset in enumerate(ASSETS):
        # An abnormal stretch every 150 readings opens (and later returns) an alert.
        episodes = tuple((a + 10 * n, 18) for a in range(60, READINGS_PER_ASSET, 150))
        rows = support.readings(start, READINGS_PER_ASSET, episodes=episodes)
        sent[asset] = {r["ts"]: r["values"] for r in rows}
        targets.append((server.url, asset, support.batches_of(rows, BATCH)))

    deadline = time.monotonic() + DEADLINE_S
    stop = threading.Event()
    kills = 0
    results: list[support.ClientLog] = []
    try:
        server.start()
        clients = threading.Thread(target=lambda: results.extend(support.run_clients(targets, keys["machine"], deadline=deadline, stop=stop)))
        clients.start()
        for _ in range(KILL_CYCLES):
            time.sleep(rng.uniform(0.2, 1.5))  # a random moment, usually mid-request
            server.kill()
            kills += 1
            time.sleep(rng.uniform(0.0, 0.3))
            server.start()
        time.sleep(1.0)  # let every client get through at least one batch on the last server
        stop.set()
        clients.join(timeout=max(1.0, deadline - time.monotonic() + 10))
        assert not clients.is_alive(), "clients did not finish before the deadline"
    finally:
        stop.set()
        server.stop()

    acked = Counter()
    for asset, log in zip(ASSETS, results):
        for batch in log.acknowledged:
            for ts in batch:
                acked[(asset, ts * 1000)] += 1
    stored = support.stored_readings(url)
    stored_values = support.query(url, "SELECT asset_id, ts_ms, \"values\" FROM readings")

    counts = {
        "kill cycles": kills,
        "POST attempts": sum(r.attempts for r in results),
        "connection errors (retried)": sum(r.connection_errors for r in results),
        "5xx/429 (retried)": sum(r.server_errors for r in results),
        "4xx": sum(len(r.client_errors) for r in results),
        "batches acknowledged": sum(len(r.acknowledged) for r in results),
        "readings acknowledged": len(acked),
        "readings stored": sum(stored.values()),
        "windows scored": sum(len(support.scores_in_order(url, a)) for a in ASSETS),
        "windows scored twice": support.windows_scored_twice(url),
        "alerts": sum(len(support.alert_rows(url, a)) for a in ASSETS),
        "alerts by replaying the rule": sum(support.reference_alerts(url, a) for a in ASSETS),
    }
    print("\ncrash test counts:\n" + "\n".join(f"  {k:32s} {v}" for k, v in counts.items()))

    assert kills >= KILL_CYCLES
    assert all(not r.client_errors for r in results), [r.client_errors[:3] for r in results]
    assert counts["connection errors (retried)"] > 0, "no kill landed while a client was talking to the server"
    # Every acknowledged reading is stored exactly once, with the values sent.
    assert all(stored.get(k) == 1 for k in acked), [k for k in acked if stored.get(k) != 1][:5]
    assert all(n == 1 for n in stored.values())
    for asset, ts_ms, values in stored_values:
        assert sent[asset][ts_ms // 1000] == (values if isinstance(values, dict) else __import__("json").loads(values))
    for asset in ASSETS:
        ts = sorted(t // 1000 for a, t in stored if a == asset)
        # Clients send in order and move on only after a 2xx: the stored rows are an unbroken prefix.
        assert ts == sorted(sent[asset])[: len(ts)]
        ends = [e for e, _ in support.scores_in_order(url, asset)]
        assert len(ends) == len(set(ends))
        assert set(ends) == support.expected_window_ends(ts), f"{asset}: due windows missing or extra after the crashes"
        alerts = support.alert_rows(url, asset)
        assert len(alerts) == support.reference_alerts(url, asset), f"{asset}: alerts differ from the rule replayed over the stored scores"
        assert sum(1 for a in alerts if a[3] is not None) <= 1
    assert counts["windows scored twice"] == 0
    assert counts["alerts"] > 0, "the scenario should open alerts"
    assert support.sqlite_integrity(db_path) == [("ok",)]
