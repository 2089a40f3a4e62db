"""`kilter serve` as a real process (two workers) on a free loopback port with the
bundled model: keys from `kilter keys create`, readings from `kilter replay`, then
plain HTTP, and a clean stop on SIGTERM."""

from __future__ import annotations

import os
import subprocess
import time
from pathlib import Path

import httpx
import pytest
from service_env import bundled_model_dir

from service.db.keys import create_key
from service.db.session import Database
from service.demo import kilter_argv, free_port, stop, wait_ready
from service.replay import read_file, replay


@pytest.fixture
def served(tmp_path: Path):
    port = free_port()
    env = {
        **os.environ,
        "KILTER_DATABASE_URL": f"sqlite:///{tmp_path / 'served.db'}",
        "KILTER_MODEL_DIR": str(bundled_model_dir()),
        "CI": "1",  # no progress bar
    }
    env.pop("KILTER_TEST_DATABASE_URL", None)
    log = open(tmp_path / "serve.log", "wb")
    proc = subprocess.Popen(kilter_argv("serve", "--port", str(port), "--workers", "2", "--log-level", "warning"),
                            env=env, stdout=log, stderr=subprocess.STDOUT, cwd=tmp_path)
    url = f"http://127.0.0.1:{port}"
    try:
        wait_ready(url, proc, timeout_s=120)
        yield url, env, proc, tmp_path
    finally:
        stop(proc)
        log.close()


def cli(env: dict[str, str], cwd: Path, *args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(kilter_argv(*args), env=env, cwd=cwd, capture_output=True, text=True, timeout=120)


def test_serve_process_end_to_end(served) -> None:
    from training import demo_data

    url, env, proc, tmp = served
    machine = cli(env, tmp, "keys", "create", "--role", "machine", "--name", "gw")
    assert machine.returncode == 0, machine.stderr
    assert len(machine.stdout.splitlines()) == 1
    mkey = machine.stdout.strip()
    db = Database(env["KILTER_DATABASE_URL"])
    with db.transaction() as s:
        pkey, _ = create_key(s, name="ann", role="maintenance")
    db.dispose()

    start = (time.time() // 60) * 60 - 3 * 3600
    demo = demo_data.generate(assets=2, days=3 / 24, start=start, fault_plan=[], outages=False)
    demo_data.write(demo, tmp / "data")
    # The same code path as `kilter replay --data FILE` (tests/http/test_commands.py runs the command).
    channels, series = read_file(tmp / "data" / "readings.csv")
    summary = replay(url=url, key=mkey, channels=channels, series=series, batch=45, progress=False)
    assert summary.accepted == summary.readings == demo.n_rows and summary.retries == 0

    with httpx.Client(base_url=url, headers={"Authorization": f"Bearer {pkey}"}, timeout=10) as http:
        assets = http.get("/v1/assets").json()["items"]
        assert [a["asset_id"] for a in assets] == ["pump-01", "pump-02"]
        assert all(a["state"] in ("normal", "alerting") and a["model_id"] == "booster-pumps" for a in assets)
        scores = http.get("/v1/assets/pump-01/scores").json()["items"]
        # Windows of 60 one-minute points every 10 minutes over 3 hours: ends from 1 h on.
        assert 10 <= len(scores) <= 13
        assert all(abs(sum(p["contributions"].values()) - 1) < 1e-3 for p in scores)
        # A retry against either worker stores nothing new.
        body = {"readings": [{"ts": float(demo.times_s["pump-01"][5]),
                              "values": {c: float(v) for c, v in zip(demo.channels, demo.values["pump-01"][5]) if v == v} | {
                                  c: None for c, v in zip(demo.channels, demo.values["pump-01"][5]) if v != v}}]}
        for _ in range(3):
            r = http.post("/v1/assets/pump-01/readings", json=body, headers={"Authorization": f"Bearer {mkey}"})
            assert r.status_code == 200 and r.json()["duplicates"] == 1
        assert http.get("/metrics").status_code == 200
        assert http.get("/v1/assets", headers={"Authorization": "Bearer nope"}).status_code == 401

    stop(proc)
    assert proc.returncode == 0
