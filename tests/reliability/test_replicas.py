"""Several service processes on one database: two separate `kilter serve` processes, one
of them with `--workers 2`, on one SQLite file and on one PostgreSQL database. Several
clients post the same readings for the same asset at once, spread over both processes.

Each window must be scored once and each abnormal stretch open one alert, never two. The
uniqueness is the database's (UNIQUE keys and transactions), since no process can see
another's memory.
"""

from __future__ import annotations

import time
from collections.abc import Iterator
from pathlib import Path

import pytest

import support
from support import Server

ASSET = "shared-01"
CLIENTS = 4
READINGS = 360
BATCH = 15


NO_PG = "PostgreSQL server programs are not installed (make system-deps installs them)"


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.skipif(not support.pg_server.available(), reason=NO_PG))])
def database_url(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'shared.db'}"
        return
    url = support.pg_server.schema_url(request.getfixturevalue("pg_base"), f"replicas-{tmp_path}")
    try:
        yield url
    finally:
        support.pg_server.drop_schema(url)


def test_replicas_score_each_window_once_and_open_one_alert(tmp_path: Path, database_url: str) -> None:
    model_dir = support.build_model(tmp_path / "models")
    keys = support.prepare_database(database_url)
    env = support.server_env(database_url, model_dir)
    servers = [Server(env, tmp_path, workers=2), Server(env, tmp_path, workers=1)]
    start = support.aligned_start(hours_back=READINGS / 60 + 1)
    episodes = ((100, 20), (250, 20))
    rows = support.readings(start, READINGS, episodes=episodes)
    batches = support.batches_of(rows, BATCH)
    try:
        for s in servers:
            s.start()
        # Every client sends every batch, half of them through each process.
        targets = [(servers[i % 2].url, ASSET, batches) for i in range(CLIENTS)]
        logs = support.run_clients(targets, keys["machine"], deadline=time.monotonic() + 90)
    finally:
        for s in servers:
            s.stop()

    assert all(not log.client_errors for log in logs), [log.client_errors[:2] for log in logs]
    assert all(len(log.acknowledged) == len(batches) for log in logs)
    stored = support.stored_readings(database_url)
    assert len(stored) == READINGS and set(stored.values()) == {1}
    ends = [e for e, _ in support.scores_in_order(database_url, ASSET)]
    assert support.windows_scored_twice(database_url) == 0
    assert set(ends) == support.expected_window_ends([r["ts"] for r in rows])
    # What the clients were told adds up to what is stored: no window counted twice.
    assert sum(log.windows_scored for log in logs) == len(ends)
    # Each window was scored from all of its readings, not from what one writer could see.
    by_index = {int(r["ts"] // support.PERIOD_S): r["values"] for r in rows}
    for e, score in support.scores_in_order(database_url, ASSET):
        want = support.tiny_score([by_index[i] for i in range(e - support.WINDOW + 1, e + 1)])
        assert score == pytest.approx(want, rel=1e-4, abs=1e-6), f"window ending at grid index {e}"
    alerts = support.alert_rows(database_url, ASSET)
    assert len(alerts) == len(episodes) == support.reference_alerts(database_url, ASSET)
    assert sum(log.alerts_opened for log in logs) == len(alerts)
    assert sum(1 for a in alerts if a[3] is not None) <= 1
