"""`kilter db backup --to FILE` copies a live SQLite database consistently (online
backup API while a writer keeps committing), and the service runs on the restored copy."""

from __future__ import annotations

import sqlite3
import subprocess
import threading
import time
from pathlib import Path

import httpx
import pytest

from fastapi.testclient import TestClient

import support
from service.app import create_app
from service.backup import BackupError, backup_sqlite
from service.settings import Settings


def _writer(path: Path, stop: threading.Event, counter: list[int]) -> None:
    """Keeps committing small transactions to the live file: each adds one audit row."""
    conn = sqlite3.connect(path, timeout=10)
    conn.execute("PRAGMA busy_timeout=10000")
    try:
        while not stop.is_set():
            conn.execute("INSERT INTO audit_log (at, actor, action, target, details) VALUES (datetime('now'), 'writer', 'tick', 'x', NULL)")
            conn.commit()
            counter[0] += 1
    finally:
        conn.close()


def test_backup_of_a_live_database_is_consistent_and_restores(tmp_path: Path) -> None:
    live = tmp_path / "live.db"
    url = f"sqlite:///{live}"
    model_dir = support.build_model(tmp_path / "models")
    keys = support.prepare_database(url)
    server = support.Server(support.server_env(url, model_dir), tmp_path)
    rows = support.readings(support.aligned_start(hours_back=3), 120, episodes=((40, 20),))
    stop, counter = threading.Event(), [0]
    try:
        server.start()
        r = httpx.post(f"{server.url}/v1/assets/pump-01/readings", json={"readings": rows}, headers={"Authorization": f"Bearer {keys['machine']}"}, timeout=30)
        assert r.status_code == 200 and r.json()["alerts_opened"] == 1, r.text
        writer = threading.Thread(target=_writer, args=(live, stop, counter))
        writer.start()
        time.sleep(0.3)
        copy = tmp_path / "copy.db"
        env = support.server_env(url, model_dir)
        done = subprocess.run([support.KILTER, "db", "backup", "--to", str(copy)], env=env, cwd=tmp_path, capture_output=True, text=True, timeout=60)
        time.sleep(0.2)
        stop.set()
        writer.join(timeout=10)
    finally:
        stop.set()
        server.stop()
    assert done.returncode == 0, done.stderr
    assert "integrity ok" in done.stderr and done.stdout == ""
    assert counter[0] > 0
    conn = sqlite3.connect(copy)
    try:
        assert conn.execute("PRAGMA integrity_check").fetchall() == [("ok",)]
        assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "delete"  # self-contained, no WAL beside it
        copied_ticks = conn.execute("SELECT COUNT(*) FROM audit_log WHERE action = 'tick'").fetchone()[0]
        assert conn.execute("SELECT COUNT(*) FROM readings").fetchone()[0] == 120
    finally:
        conn.close()
    # A snapshot of one moment: some, not necessarily all, of the writer's commits.
    assert 0 <= copied_ticks <= counter[0]

    # Restore: the service runs on the copy and has everything the backup held.
    restored = tmp_path / "restored.db"
    restored.write_bytes(copy.read_bytes())
    settings = Settings(_env_file=None, database_url=f"sqlite:///{restored}", model_dir=model_dir, retention_days=0)
    with TestClient(create_app(settings)) as client:
        h = {"Authorization": f"Bearer {keys['maintenance']}"}
        alerts = client.get("/v1/alerts", headers=h).json()["items"]
        assert len(alerts) == 1 and alerts[0]["asset_id"] == "pump-01"
        more = support.readings(support.aligned_start(hours_back=3) + 120 * 60, 10)
        r = client.post("/v1/assets/pump-01/readings", json={"readings": more}, headers={"Authorization": f"Bearer {keys['machine']}"})
        assert r.status_code == 200 and r.json()["accepted"] == 10


def test_backup_refuses_what_it_cannot_do_cleanly(tmp_path: Path) -> None:
    live = tmp_path / "live.db"
    support.prepare_database(f"sqlite:///{live}")
    with pytest.raises(BackupError, match="not an SQLite file"):
        backup_sqlite("postgresql+psycopg://u@127.0.0.1/db", tmp_path / "x.db")
    with pytest.raises(BackupError, match="does not exist"):
        backup_sqlite(f"sqlite:///{tmp_path / 'missing.db'}", tmp_path / "x.db")
    assert not (tmp_path / "missing.db").exists()  # never creates an empty database
    (tmp_path / "taken.db").write_bytes(b"keep me")
    with pytest.raises(BackupError, match="already exists"):
        backup_sqlite(f"sqlite:///{live}", tmp_path / "taken.db")
    assert (tmp_path / "taken.db").read_bytes() == b"keep me"
    with pytest.raises(BackupError, match="live database itself"):
        backup_sqlite(f"sqlite:///{live}", live, overwrite=True)
    result = backup_sqlite(f"sqlite:///{live}", tmp_path / "taken.db", overwrite=True)
    assert result.tables["api_keys"] == 4
    assert not list(tmp_path.glob(".*.partial"))
