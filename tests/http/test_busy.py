"""A busy database is a 503 with Retry-After and our error body, whichever route met it,
and nothing is stored; the same request succeeds once the lock is gone. SQLite only: the
lock is held by a second connection to the file, as another program would hold it."""

from __future__ import annotations

import sqlite3
from collections.abc import Iterator
from pathlib import Path

import pytest
from readings_support import counts, readings
from service_env import TEST_DATABASE_URL, Env, start_env

pytestmark = pytest.mark.skipif(bool(TEST_DATABASE_URL), reason="holds SQLite's file lock; PostgreSQL's lock errors map through the same handler")


@pytest.fixture
def short_env(tmp_path: Path, tiny_dir: Path) -> Iterator[Env]:
    yield from start_env(tmp_path, tiny_dir, db_busy_timeout_ms=200)


def hold_write_lock(path: Path) -> sqlite3.Connection:
    holder = sqlite3.connect(path, isolation_level=None, timeout=5)
    holder.execute("BEGIN IMMEDIATE")
    return holder


def assert_busy(r) -> None:  # type: ignore[no-untyped-def]
    assert r.status_code == 503, r.text
    assert r.headers["retry-after"] == "1"
    err = r.json()["error"]
    assert err["code"] == "database_busy" and "send the request again" in err["message"]


def test_ingest_and_a_write_route_meet_a_locked_database_as_503_with_retry_after(short_env: Env) -> None:
    env = short_env
    assert env.post("pump-01", readings(range(0, 12))).status_code == 200
    before = counts(env)
    holder = hold_write_lock(env.db_path)
    try:
        assert_busy(env.post("pump-01", readings(range(12, 18))))
        assert_busy(env.client.post("/v1/alerts/1/close", json={"outcome": "false_alarm"}, headers=env.auth("maintenance")))
        assert_busy(env.client.post("/v1/assets/pump-01/shelve", json={"until": "2999-01-01T00:00:00Z", "reason": "pump overhaul"},
                                    headers=env.auth("operator")))
    finally:
        holder.execute("ROLLBACK")
        holder.close()
    assert counts(env) == before
    again = env.post("pump-01", readings(range(12, 18)))
    assert again.status_code == 200 and again.json()["accepted"] == 6
