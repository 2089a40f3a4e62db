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
    put = b.client.put("/v1/assets/pump-01/threshold", json={"warning": 7.0, "reason": "site trial of a higher level", "confirm_short_history": True}, headers=b.auth("operator"))
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


# --- dashboard sessions ------------------------------------------------------------------


def sign_in(env: Env, key: str) -> str:
    """Sign in through `env`'s app; the session cookie it set."""
    import re

    env.client.cookies.clear()
    page = env.client.get("/signin")
    token = re.search(r'name="signin_token" value="([^"]+)"', page.text).group(1)
    r = env.client.post("/signin", data={"api_key": key, "signin_token": token, "next": "/alerts"}, follow_redirects=False)
    assert r.status_code == 303, r.text
    return env.client.cookies["kilter_session"]


def page(env: Env, cookie: str, path: str = "/alerts") -> int:
    env.client.cookies.clear()
    env.client.cookies.set("kilter_session", cookie)
    return env.client.get(path, follow_redirects=False).status_code


def test_a_session_from_one_worker_holds_on_the_other_and_sign_out_ends_it_everywhere(pair: tuple[Env, Env]) -> None:
    import re

    a, b = pair
    cookie = sign_in(a, a.keys["maintenance"])
    assert page(b, cookie) == 200 and page(a, cookie) == 200
    # The sign-in form of one worker is accepted by the other (one secret, in the database).
    a.client.cookies.clear()
    form = a.client.get("/signin")
    token = re.search(r'name="signin_token" value="([^"]+)"', form.text).group(1)
    nonce = a.client.cookies["kilter_signin"]
    b.client.cookies.clear()
    b.client.cookies.set("kilter_signin", nonce)
    r = b.client.post("/signin", data={"api_key": a.keys["operator"], "signin_token": token}, follow_redirects=False)
    assert r.status_code == 303, r.text
    # Sign out on b: the same cookie, replayed on either worker, is signed out.
    page(b, cookie)
    csrf = re.search(r'name="csrf_token" value="([^"]+)"', b.client.get("/alerts").text).group(1)
    assert b.client.post("/signout", data={"csrf_token": csrf}, follow_redirects=False).status_code == 303
    assert page(a, cookie) == 303 and page(b, cookie) == 303


def test_revoking_a_key_signs_it_out_and_refuses_it_on_the_api(pair: tuple[Env, Env]) -> None:
    a, b = pair
    key = a.add_key("operator", "night-shift")
    cookie = sign_in(a, key)
    assert page(b, cookie) == 200
    assert b.client.get("/v1/assets", headers={"Authorization": f"Bearer {key}"}).status_code == 200
    (row,) = [k for k in a.client.get("/v1/keys", headers=a.auth("admin")).json()["items"] if k["name"] == "night-shift"]
    assert row["prefix"] == key[:10] and row["revoked_at"] is None and "key" not in row
    r = a.client.post(f"/v1/keys/{row['id']}/revoke", headers=a.auth("admin"))
    assert r.status_code == 200 and r.json()["revoked_at"] is not None
    assert b.client.get("/v1/assets", headers={"Authorization": f"Bearer {key}"}).status_code == 401
    assert page(b, cookie) == 303 and page(a, cookie) == 303
    assert a.client.post(f"/v1/keys/{row['id']}/revoke", headers=a.auth("admin")).status_code == 409
    assert a.client.post("/v1/keys/99999/revoke", headers=a.auth("admin")).status_code == 404
    audit = a.rows("SELECT actor, action FROM audit_log WHERE target = ?", f"api_key:{row['id']}")
    assert ("test-admin", "key.revoke") in audit
    assert a.rows("SELECT COUNT(*) FROM web_sessions WHERE key_id = ? AND ended_at IS NULL", row["id"]) == [(0,)]


def test_rotating_a_key_gives_a_new_one_with_the_same_role_and_assets(pair: tuple[Env, Env]) -> None:
    a, b = pair
    old = a.add_key("machine", "gateway-3", assets=["pump-01"])
    (row,) = [k for k in a.client.get("/v1/keys", headers=a.auth("admin")).json()["items"] if k["name"] == "gateway-3"]
    r = a.client.post(f"/v1/keys/{row['id']}/rotate", headers=a.auth("admin"))
    assert r.status_code == 200, r.text
    body = r.json()
    new = body["key"]
    assert new != old and body["item"]["role"] == "machine" and body["item"]["assets"] == ["pump-01"]
    assert body["replaces"]["revoked_at"] is not None
    assert b.post("pump-01", readings(range(0, 4)), key=old).status_code == 401
    assert b.post("pump-01", readings(range(0, 4)), key=new).status_code == 200
    assert b.post("pump-02", readings(range(0, 4)), key=new).status_code == 403
    for role in ("machine", "maintenance", "operator"):
        assert a.client.get("/v1/keys", headers=a.auth(role)).status_code == 403
        assert a.client.post(f"/v1/keys/{row['id']}/rotate", headers=a.auth(role)).status_code == 403


def test_keys_list_revoke_rotate_on_the_command_line(monkeypatch, tmp_path: Path, tiny_dir: Path, capsys) -> None:
    from service.cli import main

    monkeypatch.setenv("KILTER_DATABASE_URL", f"sqlite:///{tmp_path / 'cli.db'}")
    monkeypatch.setenv("KILTER_MODEL_DIR", str(tiny_dir))
    monkeypatch.chdir(tmp_path)
    assert main(["keys", "create", "--role", "operator", "--name", "day-shift"]) == 0
    first = capsys.readouterr().out.strip()
    assert main(["keys", "list"]) == 0
    out = capsys.readouterr().out
    assert "day-shift" in out and first[:10] in out and first not in out
    assert main(["keys", "rotate", "1"]) == 0
    captured = capsys.readouterr()
    second = captured.out.strip()
    assert second.startswith("kt_") and second != first and len(captured.out.splitlines()) == 1
    assert main(["keys", "revoke", "2"]) == 0
    capsys.readouterr()
    assert main(["keys", "revoke", "2"]) == 2
    assert "already revoked" in capsys.readouterr().err
    assert main(["keys", "rotate", "7"]) == 2
    lines = [ln.split() for ln in (main(["keys", "list"]), capsys.readouterr().out)[1].splitlines()[1:]]
    assert [(ln[0], ln[-1] != "-") for ln in lines] == [("1", True), ("2", True)]


def test_a_replica_that_cannot_load_the_bound_version_is_not_ready(pair: tuple[Env, Env], tmp_path: Path, tiny_dir: Path) -> None:
    """One replica's model folder lacks the version another switched the cluster to: it says
    so (503) instead of answering with another model than the rest."""
    import shutil

    a, b = pair
    assert a.post("pump-01", readings(range(0, 8))).status_code == 200
    other = tmp_path / "other-models"
    shutil.copytree(tiny_dir, other)
    gen = start_env(tmp_path, other)  # a third process on the same database, with its own disk
    c = next(gen)
    try:
        tiny_model.build(tiny_dir, model_id=MODEL, version="2", warning=5.5)
        assert a.client.post("/v1/models/reload", headers=a.auth("admin")).status_code == 200
        r = c.client.get("/readyz")
        assert r.status_code == 503 and "cannot load it" in r.json()["checks"]["models"]
        r = c.post("pump-01", readings(range(8, 10)))
        assert r.status_code == 503 and f"{MODEL}/2" in r.json()["error"]["message"], r.text
        assert b.client.get("/readyz").status_code == 200
    finally:
        with pytest.raises(StopIteration):
            next(gen)
