"""Cluster state lives in the database (issue 11), checked with two apps on one database,
each with its own registry and memory, as two worker processes would have: a reload served
by one is what the other answers with from its next batch on, and it makes exactly one new
threshold version per asset, created by whoever switched."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest

import tiny_model
from readings_support import readings
from service_env import Env, start_env

MODEL = "test-pumps"


@pytest.fixture
def pair(tmp_path: Path, tiny_dir: Path) -> Iterator[tuple[Env, Env]]:
    """Two apps (two 'workers') on one database and one model folder."""
    first = start_env(tmp_path, tiny_dir)
    a = next(first)
    second = start_env(tmp_path, tiny_dir)
    b = next(second)
    try:
        yield a, b
    finally:
        for gen in (second, first):
            with pytest.raises(StopIteration):
                next(gen)


def thresholds(env: Env, asset: str) -> list[tuple]:
    return env.rows("SELECT version, origin, warning, model_version, created_by FROM threshold_versions WHERE asset_id = ? ORDER BY version", asset)


def test_a_reload_on_one_worker_is_what_every_worker_serves_next(pair: tuple[Env, Env], tiny_dir: Path) -> None:
    a, b = pair
    for env, asset, steps in ((a, "pump-01", range(0, 8)), (b, "pump-02", range(0, 8))):
        r = env.post(asset, readings(steps))
        assert r.status_code == 200 and r.json()["model_version"] == "1", r.text
    tiny_model.build(tiny_dir, model_id=MODEL, version="2", warning=5.5)
    r = a.client.post("/v1/models/reload", headers=a.auth("admin"))
    assert r.status_code == 200, r.text
    assert r.json()["changed"] == {MODEL: {"from": "1", "to": "2"}}
    # b never saw the reload: its next batch, for either asset, is scored with version 2.
    answers = []
    for i, asset in enumerate(["pump-01", "pump-02"] * 4):
        env = (b, a)[i % 2]
        r = env.post(asset, readings(range(8 + 2 * i, 10 + 2 * i)))
        assert r.status_code == 200, r.text
        answers.append(r.json()["model_version"])
    assert answers == ["2"] * 8
    # Exactly one new threshold version per asset, at the switch, by the admin who switched.
    for asset in ("pump-01", "pump-02"):
        rows = thresholds(a, asset)
        assert [(v, o, w, mv) for v, o, w, mv, _ in rows] == [(1, "calibrated", 4.0, "1"), (2, "calibrated", 5.5, "2")]
        assert rows[1][4] == "test-admin"
    switch = a.rows("SELECT actor, details FROM audit_log WHERE action = 'model.switch'")
    assert len(switch) == 1 and switch[0][0] == "test-admin"
    # Scores after the switch are stored under version 2 only, from both apps.
    assert a.rows("SELECT DISTINCT model_version FROM window_scores WHERE window_end_ms > (SELECT MIN(window_end_ms) FROM window_scores WHERE model_version = '2')") == [("2",)]
    # GET /v1/models on the other app reports the new version too.
    (m,) = b.client.get("/v1/models", headers=b.auth("admin")).json()["items"]
    assert m["version"] == "2"


def test_an_operators_threshold_survives_batches_on_every_worker(pair: tuple[Env, Env], tiny_dir: Path) -> None:
    a, b = pair
    assert a.post("pump-01", readings(range(0, 8))).status_code == 200
    tiny_model.build(tiny_dir, model_id=MODEL, version="2", warning=5.5)
    assert a.client.post("/v1/models/reload", headers=a.auth("admin")).status_code == 200
    put = b.client.put("/v1/assets/pump-01/threshold", json={"warning": 7.0, "reason": "site trial"}, headers=b.auth("operator"))
    assert put.status_code == 200, put.text
    for i, env in enumerate((a, b, a, b)):
        r = env.post("pump-01", readings(range(8 + 2 * i, 10 + 2 * i)))
        assert r.status_code == 200 and r.json()["threshold_version"] == 3, r.text
    assert [row[:3] for row in thresholds(a, "pump-01")] == [(1, "calibrated", 4.0), (2, "calibrated", 5.5), (3, "manual", 7.0)]


def test_a_worker_that_has_not_caught_up_stores_nothing(pair: tuple[Env, Env], tiny_dir: Path) -> None:
    """A batch scored with the old version that reaches the write after the switch (the
    race between the per-batch check and the write lock) is refused with a retryable 503 and
    stores nothing, instead of making a threshold version of its own."""
    from service.db.bindings import ensure_threshold
    from service.db.session import Database
    from service.errors import ModelSwitched

    a, b = pair
    assert a.post("pump-01", readings(range(0, 8))).status_code == 200
    old = b.client.app.state.registry.get(MODEL)
    tiny_model.build(tiny_dir, model_id=MODEL, version="2", warning=5.5)
    assert a.client.post("/v1/models/reload", headers=a.auth("admin")).status_code == 200
    db = Database(a.settings.database_url)
    try:
        with db.transaction() as s, pytest.raises(ModelSwitched, match="send the batch again"):
            ensure_threshold(s, asset_id="pump-01", manifest=old.manifest, first=False)
    finally:
        db.dispose()
    assert [row[0] for row in thresholds(a, "pump-01")] == [1, 2]
