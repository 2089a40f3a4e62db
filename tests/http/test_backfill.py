"""Backfill (issue 12): history posted with `?backfill=true` (admin keys) is scored window by
window with the live streaming core and no lateness limit, opens the alerts `kilter
evaluate` finds on the same file, marks them backfilled, and a resend changes nothing."""

from __future__ import annotations

import random

import numpy as np

from service.replay import read_file
from service_env import bundled_model_dir, start_env

START = "2026-10-13T00:00:00Z"  # the day after the bundled model's training data ends


def _post_file(env, series, channels, *, key: str, sizes: list[int], seed: int) -> list[dict]:
    rng = random.Random(seed)
    answers = []
    for asset, s in series.items():
        i = 0
        while i < len(s.times_s):
            n = rng.choice(sizes)
            rows = [{"ts": float(t), "values": {c: (None if not np.isfinite(v) else float(v)) for c, v in zip(channels, row)}}
                    for t, row in zip(s.times_s[i : i + n], s.values[i : i + n])]
            r = env.client.post(f"/v1/assets/{asset}/readings?backfill=true", json={"readings": rows},
                                headers={"Authorization": f"Bearer {key}"})
            assert r.status_code == 200, r.text
            answers.append(r.json())
            i += n
    return answers


def test_a_backfill_of_demo_history_opens_the_alerts_evaluate_finds(tmp_path) -> None:
    from training import demo_data
    from training.evaluate import evaluate, load_inputs

    demo = demo_data.generate(assets=2, days=3, seed=7, start=START)
    data, events = demo_data.write(demo, tmp_path / "demo")
    model = bundled_model_dir() / "booster-pumps" / "1"
    inputs = load_inputs(model, data, events)
    ev = evaluate(model, inputs.series, inputs.events, progress=False)
    expected = {t.asset: sorted((round(a), round(b)) for a, b in t.alerts) for t in ev.model.tracks}
    assert sum(len(v) for v in expected.values()) >= 2, expected  # the stretch holds faults that raise alerts

    channels, series = read_file(data)
    gen = start_env(tmp_path / "svc", bundled_model_dir())
    env = next(gen)
    try:
        rows = [{"ts": float(series["pump-01"].times_s[0]), "values": {c: 1.0 for c in channels}}]
        for role in ("machine", "maintenance", "operator"):
            r = env.client.post("/v1/assets/pump-01/readings?backfill=true", json={"readings": rows}, headers=env.auth(role))
            assert r.status_code == 403, (role, r.text)
            if role == "machine":
                assert r.json()["error"]["field"] == "query.backfill" and "admin key" in r.json()["error"]["message"]
        assert env.count("readings") == 0

        # A route that wants every transition: a backfill's alerts must still queue nothing (issue 14).
        from service.db import outbox

        with env.client.app.state.db.transaction() as s:
            outbox.add_route(s, name="desk-hook", channel="webhook", target="http://127.0.0.1:9/hook", actor="test")
        first = _post_file(env, series, channels, key=env.keys["admin"], sizes=[500, 1440, 2000], seed=1)
        assert sum(a["late"] for a in first) == 0
        got = {}
        for asset in series:
            items = env.client.get(f"/v1/alerts?asset={asset}&limit=200", headers=env.auth("maintenance")).json()["items"]
            assert all(a["backfilled"] for a in items)
            got[asset] = sorted((_s(a["opened_at"]), _s(a["returned_at"] or a["last_seen_at"])) for a in items)
        assert got == {a: expected.get(a, []) for a in series}
        assert env.count("alerts") >= 2 and env.count("notify_outbox") == 0, "backfilled alerts queued notifications"

        # Idempotent: the same backfill again, cut differently, changes nothing.
        before = {t: env.count(t) for t in ("readings", "window_scores", "skipped_windows", "alerts", "alert_events")}
        again = _post_file(env, series, channels, key=env.keys["admin"], sizes=[333, 3000], seed=2)
        assert sum(a["accepted"] + a["windows_scored"] + a["alerts_opened"] for a in again) == 0
        assert {t: env.count(t) for t in before} == before
    finally:
        gen.close()


def _s(iso: str) -> int:
    from datetime import datetime

    return round(datetime.fromisoformat(iso.replace("Z", "+00:00")).timestamp())
