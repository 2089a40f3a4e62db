"""The service's commands in-process: keys create, db upgrade, serve's start-up checks,
replay's file reading, retries and refusals. Settings reach a command through KILTER_*
variables, as they do in production (monkeypatch restores them)."""

from __future__ import annotations

import json

import shutil
import sqlite3
from pathlib import Path

import numpy as np
import pytest

from service.cli import main
from service.db.keys import hash_key
from service.replay import AssetSeries, ReplayError, read_file, replay


@pytest.fixture
def cli_env(monkeypatch, tmp_path: Path, tiny_dir: Path) -> Path:
    db = tmp_path / "cli.db"
    monkeypatch.setenv("KILTER_DATABASE_URL", f"sqlite:///{db}")
    monkeypatch.setenv("KILTER_MODEL_DIR", str(tiny_dir))
    monkeypatch.chdir(tmp_path)  # no stray .env is read
    return db


def test_keys_create_prints_the_key_alone_on_one_line(cli_env: Path, capsys) -> None:
    assert main(["keys", "create", "--role", "machine", "--name", "gateway-7", "--assets", "pump-01,pump-02"]) == 0
    out, err = capsys.readouterr()
    lines = out.splitlines()
    assert len(lines) == 1 and out.endswith("\n")
    key = lines[0]
    assert key.startswith("kt_") and len(key) >= 40
    assert "machine key" in err and key not in err
    with sqlite3.connect(cli_env) as c:
        rows = c.execute("SELECT name, role, assets, key_hash FROM api_keys").fetchall()
        audit = c.execute("SELECT action, actor FROM audit_log").fetchall()
    assert [(n, r, json.loads(a), h) for n, r, a, h in rows] == [("gateway-7", "machine", ["pump-01", "pump-02"], hash_key(key))]
    assert audit == [("key.create", "cli")]


@pytest.mark.parametrize(
    ("args", "words"),
    [
        (["--role", "operator", "--name", "ann", "--assets", "pump-01"], "only machine keys"),
        (["--role", "machine", "--name", "gw", "--assets", "bad id!"], "asset id"),
        (["--role", "machine", "--name", " "], "name"),
    ],
)
def test_keys_create_refusals_exit_2_with_the_reason(cli_env: Path, capsys, args: list[str], words: str) -> None:
    assert main(["keys", "create", *args]) == 2
    out, err = capsys.readouterr()
    assert out == "" and words in err
    with sqlite3.connect(cli_env) as c:
        assert c.execute("SELECT COUNT(*) FROM api_keys").fetchone()[0] == 0


def test_db_upgrade_creates_the_schema_and_is_repeatable(cli_env: Path, capsys) -> None:
    assert main(["db", "upgrade"]) == 0
    assert "upgraded from empty to" in capsys.readouterr().err
    assert main(["db", "upgrade"]) == 0
    assert "already at revision" in capsys.readouterr().err
    with sqlite3.connect(cli_env) as c:
        tables = {r[0] for r in c.execute("SELECT name FROM sqlite_master WHERE type='table'")}
        assert c.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert {"api_keys", "assets", "readings", "window_scores", "alerts", "alert_events", "threshold_versions", "audit_log"} <= tables


def test_serve_refuses_a_bad_model_before_listening(cli_env: Path, tmp_path: Path, tiny_dir: Path, monkeypatch, capsys) -> None:
    bad = tmp_path / "bad"
    shutil.copytree(tiny_dir, bad)
    manifest = bad / "test-pumps" / "1" / "manifest.json"
    manifest.write_text(manifest.read_text().replace('"window": 6', '"window": 7'))
    monkeypatch.setenv("KILTER_MODEL_DIR", str(bad))
    assert main(["serve", "--port", "1"]) == 2
    err = capsys.readouterr().err
    assert "refusing to start" in err and "sha256" not in err and "[batch, 7, 6]" in err


def test_replay_reads_a_wide_csv_and_posts_it(env, tmp_path: Path) -> None:
    import tiny_model

    path = tmp_path / "readings.csv"
    lines = ["timestamp,asset," + ",".join(tiny_model.CHANNELS)]
    for i in range(30):
        for asset in ("pump-01", "pump-02"):
            vals = [str(c + 0.01 * (i % 3)) if not (asset == "pump-02" and i == 7 and j == 2) else ""
                    for j, c in enumerate(tiny_model.CENTER)]
            lines.append(f"2026-10-01T00:{i:02d}:02Z,{asset}," + ",".join(vals))
    path.write_text("\n".join(lines) + "\n")
    channels, series = read_file(path)
    assert channels == tiny_model.CHANNELS and set(series) == {"pump-01", "pump-02"}
    assert np.isnan(series["pump-02"].values[7, 2])
    summary = replay(url="http://testserver", key=env.keys["machine"], channels=channels, series=series,
                     batch=7, progress=False, client=env.client)
    assert (summary.readings, summary.accepted, summary.duplicates, summary.requests) == (60, 60, 0, 10)
    assert summary.windows_scored == env.count("window_scores") == 2 * 12
    again = replay(url="http://testserver", key=env.keys["machine"], channels=channels, series=series,
                   batch=30, progress=False, client=env.client)
    assert (again.accepted, again.duplicates, again.windows_scored) == (0, 60, 0)


def test_replay_retries_connection_errors_then_gives_up(tmp_path: Path) -> None:
    from service.demo import free_port

    port = free_port()  # nothing listens there
    waits: list[float] = []
    series = {"pump-01": AssetSeries(np.array([1.79e9]), np.zeros((1, 6)))}
    with pytest.raises(ReplayError, match="gave up after 4 attempts") as e:
        replay(url=f"http://127.0.0.1:{port}", key="k", channels=["a"] * 6, series=series, retries=3,
               progress=False, sleep=waits.append)
    assert "asset pump-01" in str(e.value) and "ConnectError" in str(e.value)
    assert waits == [0.25, 0.5, 1.0]  # exponential backoff


def test_replay_does_not_retry_a_refused_batch(env) -> None:
    series = {"pump-01": AssetSeries(np.array([1.79e9 + 60 * i for i in range(3)]), np.zeros((3, 5)))}
    channels = ["flow_m3h", "suction_kpa", "discharge_kpa", "current_a", "bearing_temp_c"]
    summary = replay(url="http://testserver", key=env.keys["machine"], channels=channels,
                     series=series, progress=False, client=env.client, sleep=lambda s: pytest.fail("retried a 422"))
    assert [(r.status, r.where) for r in summary.refused] == [(422, "asset pump-01 readings 0..2")]
    assert "missing channel" in summary.refused[0].message and summary.accepted == 0
    with pytest.raises(ReplayError, match=r"stopping at .*refused the batch \(422\).*missing channel"):
        replay(url="http://testserver", key=env.keys["machine"], channels=channels, series=series, progress=False,
               client=env.client, sleep=lambda s: pytest.fail("retried a 422"), stop_on_refusal=True)


def test_replay_speed_paces_batches_by_data_time(env) -> None:
    import tiny_model

    t = 1.7908128e9 + 60.0 * np.arange(40)
    vals = np.tile(np.array(tiny_model.CENTER), (40, 1)) + np.arange(40)[:, None] * 0.01
    waits: list[float] = []
    summary = replay(url="http://testserver", key=env.keys["machine"], channels=tiny_model.CHANNELS,
                     series={"pump-01": AssetSeries(t, vals)}, batch=10, speed=600.0, progress=False,
                     client=env.client, sleep=waits.append)
    assert summary.accepted == 40 and summary.requests == 4
    # Batches start 10 minutes of data apart, so at 600x real time batch k is due k seconds
    # after the start; the (recorded, not slept) wait is that less the time spent so far.
    assert len(waits) == 3
    assert all(0 < w <= k for k, w in enumerate(waits, start=1))
    assert all(0 < b - a <= 1.0 for a, b in zip(waits, waits[1:]))


def test_replay_reads_long_csv_like_wide_with_its_own_parser(tmp_path: Path) -> None:
    """One parser for replay (stdlib csv) wherever it runs: long and wide layouts agree, Parquet is refused."""
    import sys

    wide = tmp_path / "wide.csv"
    wide.write_text("timestamp,asset,a_kpa,b_c\n2026-10-01T00:01:00Z,p2,1.5,\n2026-10-01T00:00:00Z,p1,2,3\n")
    long = tmp_path / "long.csv"
    long.write_text(
        "asset,timestamp,channel,value,unit\np2,2026-10-01T00:01:00Z,a_kpa,1.5,kPa\np1,2026-10-01T00:00:00Z,a_kpa,2,kPa\n"
        "p1,2026-10-01T00:00:00Z,b_c,3,degC\n"
    )
    before = set(sys.modules)
    cw, sw = read_file(wide)
    cl, sl = read_file(long)
    assert not any(m.startswith(("training", "pyarrow")) for m in set(sys.modules) - before)
    assert cw == cl == ("a_kpa", "b_c") and set(sw) == set(sl) == {"p1", "p2"}
    for a in sw:
        np.testing.assert_array_equal(sw[a].times_s, sl[a].times_s)
        np.testing.assert_array_equal(sw[a].values, sl[a].values)  # NaN where p2 has no b_c
    (tmp_path / "r.parquet").write_bytes(b"PAR1")
    with pytest.raises(ReplayError, match="replay reads CSV only"):
        read_file(tmp_path / "r.parquet")
    (tmp_path / "bad.csv").write_text("time,asset,x\n")
    with pytest.raises(ReplayError, match="no 'timestamp' column"):
        read_file(tmp_path / "bad.csv")
