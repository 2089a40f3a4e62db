"""POST readings: storage, idempotency, windows scored exactly once (in order, out of
order, late), gaps, the alert rule on ingest, stateless scoring, and the asset views."""

from __future__ import annotations

import json

import random

import numpy as np
import pytest
import tiny_model
from readings_support import PERIOD_S, T0, counts, reading, readings

W, STRIDE, FILL = 6, 2, 2  # the tiny model's window, stride and max_fill_steps
BASE_IDX = T0 // PERIOD_S


def scored_ends(env, asset: str) -> list[int]:
    return [r[0] for r in env.rows("SELECT window_end_index FROM window_scores WHERE asset_id=? ORDER BY window_end_index", asset)]


def test_post_stores_readings_and_scores_completed_windows(env) -> None:
    r = env.post("pump-01", readings(range(10)))
    assert r.status_code == 200, r.text
    body = r.json()
    assert (body["accepted"], body["duplicates"], body["model_id"], body["model_version"]) == (10, 0, "test-pumps", "1")
    # Grid steps 0..9: windows of 6 end on even steps from 5 on -> steps 6 and 8.
    assert body["windows_scored"] == 2
    assert scored_ends(env, "pump-01") == [BASE_IDX + 6, BASE_IDX + 8]
    assert body["first_window_end"] == "2026-10-01T00:06:00Z" and body["last_window_end"] == "2026-10-01T00:08:00Z"
    assert env.count("readings") == 10
    # Threshold version 1 comes from the manifest, and each score records it.
    assert env.rows("SELECT version, warning, critical, origin FROM threshold_versions") == [(1, 4.0, 25.0, "calibrated")]
    assert env.count("window_scores", "threshold_version_id IS NOT NULL") == 2


def test_retry_and_overlap_store_each_reading_once(env) -> None:
    first = env.post("pump-01", readings(range(12))).json()
    again = env.post("pump-01", readings(range(12))).json()
    assert (again["accepted"], again["duplicates"], again["windows_scored"]) == (0, 12, 0)
    overlap = env.post("pump-01", readings(range(8, 20))).json()
    assert (overlap["accepted"], overlap["duplicates"]) == (8, 4)
    assert env.count("readings") == 20
    ends = scored_ends(env, "pump-01")
    assert ends == sorted(set(ends)) == [BASE_IDX + e for e in range(6, 20, 2)]
    assert first["windows_scored"] + overlap["windows_scored"] == len(ends)


def test_same_reading_twice_in_one_batch_counts_as_duplicate(env) -> None:
    batch = readings(range(6)) + [reading(3)]
    body = env.post("pump-01", batch).json()
    assert (body["accepted"], body["duplicates"]) == (6, 1)


def test_different_value_for_stored_timestamp_is_409_and_stores_nothing(env) -> None:
    env.post("pump-01", readings(range(10)))
    before = counts(env)
    batch = readings(range(10, 14)) + [reading(4, dev=1.0)]
    r = env.post("pump-01", batch)
    assert r.status_code == 409
    err = r.json()["error"]
    assert err["code"] == "conflict" and err["field"] == "body.readings[4].ts"
    assert "2026-10-01T00:04:03Z" in err["message"]
    assert counts(env) == before  # the four new readings of that batch were not stored either


def test_out_of_order_batches_within_the_hold_score_what_one_in_order_post_scores(tmp_path, tiny_dir) -> None:
    """Shuffled batches whose readings arrive at most `hold_steps` out of order end with
    exactly the windows and scores of one in-order post (service/stream.py)."""
    from service_env import start_env

    gen = start_env(tmp_path, tiny_dir, hold_steps=40)
    env = next(gen)
    try:
        steps = list(range(80))
        devs = {i: (2.5 if 14 <= i < 22 else 0.3 * np.sin(i)) for i in steps}
        in_order = [reading(i, devs[i]) for i in steps]
        env.post("pump-01", in_order)
        chunks = [in_order[i : i + 5] for i in range(0, 40, 5)]
        random.Random(3).shuffle(chunks)
        for c in [*chunks, in_order[40:]]:
            assert env.post("pump-02", c).status_code == 200
        a = env.rows("SELECT window_end_index, round(score, 5) FROM window_scores WHERE asset_id='pump-01' ORDER BY 1")
        b = env.rows("SELECT window_end_index, round(score, 5) FROM window_scores WHERE asset_id='pump-02' ORDER BY 1")
        assert a == b and len(a) == 17  # ends 6, 8, ..., 38: a window waits until the newest reading is 40 steps past it
        assert env.count("skipped_windows") == 0
    finally:
        gen.close()


def test_windows_do_not_depend_on_where_a_batch_is_cut(env) -> None:
    """Grid steps 0-9 then 11-20 score the window ending at 10 (formed from step 9's value
    filled forward), exactly as one post of the same rows does; before the streaming core the
    second batch looked for due windows only from its first reading, and the window was lost."""
    rows = readings([*range(10), *range(11, 21)])
    one = env.post("pump-01", rows).json()
    first = env.post("pump-02", rows[:10]).json()
    second = env.post("pump-02", rows[10:]).json()
    a = env.rows("SELECT window_end_index, round(score, 6) FROM window_scores WHERE asset_id='pump-01' ORDER BY 1")
    b = env.rows("SELECT window_end_index, round(score, 6) FROM window_scores WHERE asset_id='pump-02' ORDER BY 1")
    assert a == b
    assert [e - BASE_IDX for e, _ in a] == [6, 8, 10, 12, 14, 16, 18, 20]
    assert one["windows_scored"] == first["windows_scored"] + second["windows_scored"] == 8


def test_an_outage_posted_in_two_batches_keeps_its_windows_and_gap_records(env) -> None:
    """Steps 0-11, an outage 12-17, then 18-40: one post, or the same rows cut at the outage,
    give the same scored windows (12: steps 12-13 filled from 11) and gap records (14-22);
    before the streaming core the second batch formed nothing before its first reading."""
    rows = readings([*range(12), *range(18, 41)])
    env.post("pump-01", rows)
    env.post("pump-02", rows[:12])
    env.post("pump-02", rows[12:])
    for table in ("window_scores", "skipped_windows"):
        a = env.rows(f"SELECT window_end_index FROM {table} WHERE asset_id='pump-01' ORDER BY 1")
        b = env.rows(f"SELECT window_end_index FROM {table} WHERE asset_id='pump-02' ORDER BY 1")
        assert a == b and a, table


def test_late_reading_closes_a_gap_and_its_windows_are_scored(env) -> None:
    # Steps 10..13 missing: a 4-step hole, longer than the 2-step fill, breaks windows.
    r = env.post("pump-01", readings([*range(10), *range(14, 30)])).json()
    # Forward fill covers steps 10 and 11 from step 9; 12 and 13 stay empty, so the windows
    # holding them (ends 12, 14, 16, 18) are gap windows; the one ending at 10 is scored.
    gap_ends = [12, 14, 16, 18]
    assert r["gap_windows"] == len(gap_ends)
    assert set(scored_ends(env, "pump-01")).isdisjoint({BASE_IDX + e for e in gap_ends})
    assets = env.client.get("/v1/assets", headers=env.auth("maintenance")).json()["items"]
    assert assets[0]["gap_windows"] == 4
    late = env.post("pump-01", readings(range(10, 14))).json()
    assert late["windows_scored"] == 4 and late["late"] == 0
    ends = scored_ends(env, "pump-01")
    assert ends == [BASE_IDX + e for e in range(6, 30, 2)]
    assert env.count("skipped_windows") == 0


def test_plan_made_before_the_lock_is_made_again_when_another_writer_changed_the_asset(env, monkeypatch) -> None:
    """A batch's windows are formed and scored before the write lock, then written under it
    only if the asset's ingest_seq has not moved. Here a late reading for the same asset is
    stored in between: the batch must be planned again, so its window holds that reading."""
    import service.ingest as ingest_module
    from service.api.deps import Caller

    env.post("pump-01", readings([*range(9), 10, 11]))  # step 9 missing: forward-filled from step 8
    state = env.client.app.state
    real_prepare = ingest_module._prepare
    calls = []

    def prepare_then_interleave(*args, **kwargs):
        plan = real_prepare(*args, **kwargs)
        calls.append(plan.seq)
        if len(calls) == 1:  # the batch's first plan: another writer stores step 9 now
            late = reading(9, dev=3.0)
            ingest_module.ingest(db=state.db, registry=state.registry, settings=env.settings, metrics=state.metrics,
                                 caller=Caller(0, "other-writer", "machine", None), asset_id="pump-01",
                                 readings=[ingest_module.RawReading(late["ts"], late["values"])])
        return plan

    monkeypatch.setattr(ingest_module, "_prepare", prepare_then_interleave)
    r = env.post("pump-01", readings([12, 13])).json()
    # The batch's plan (seq 1), the other writer's (seq 1), the batch's again under the lock (seq 2).
    assert calls == [1, 1, 2], calls
    assert r["windows_scored"] == 1 and r["first_window_end"] == "2026-10-01T00:12:00Z"
    assert "kilter_ingest_replans_total 1" in env.client.get("/metrics").text

    # The stored score is the window with the late reading in it, not the forward-filled one.
    def window(step9_dev: float) -> list[list[float]]:
        return [[reading(i, step9_dev if i == 9 else 0.0)["values"][c] for c in tiny_model.CHANNELS] for i in range(7, 13)]

    scored = env.client.post("/v1/score", json={"windows": [window(3.0), window(0.0)]}, headers=env.auth("machine")).json()["scores"]
    assert scored[0] > scored[1] * 2  # the late reading moves this window's score
    (stored,) = env.rows("SELECT score FROM window_scores WHERE asset_id=? AND window_end_index=?", "pump-01", BASE_IDX + 12)
    assert stored[0] == pytest.approx(scored[0], rel=1e-6)


def test_readings_beyond_the_lateness_limit_are_stored_not_scored(tmp_path, tiny_dir) -> None:
    from service_env import start_env

    gen = start_env(tmp_path, tiny_dir, lateness_windows=3)
    env = next(gen)
    try:
        env.post("pump-01", readings([*range(6), *range(12, 40)]))
        before = scored_ends(env, "pump-01")
        late = env.post("pump-01", readings(range(6, 12))).json()
        # Newest step 39: windows ending before 39 - 3 * 2 = 33 are not formed again.
        assert late["accepted"] == 6 and late["late"] == 6 and late["windows_scored"] == 0
        assert scored_ends(env, "pump-01") == before
        assert env.count("readings") == 40
    finally:
        gen.close()


def test_alert_opens_escalates_returns_with_events_peak_and_top_channel(env) -> None:
    # bearing_temp_c alone: dev d on one of six channels scores d^2 / 6 once the window is full of it.
    env.post("pump-01", readings(range(12)))
    hot = [reading(i, 6.0, channel="bearing_temp_c") for i in range(12, 24)]  # up to 36/6 = 6 >= warning 4
    r1 = env.post("pump-01", hot).json()
    assert r1["alerts_opened"] == 1
    hotter = [reading(i, 15.0, channel="bearing_temp_c") for i in range(24, 36)]  # 225/6 = 37.5 >= critical 25
    r2 = env.post("pump-01", hotter).json()
    assert r2["alerts_escalated"] == 1 and r2["alerts_opened"] == 0
    r3 = env.post("pump-01", readings(range(36, 52))).json()
    assert r3["alerts_returned"] == 1
    (alert,) = env.rows("SELECT id, severity, condition, active_key, peak_score, top_channels, opened_at, returned_at FROM alerts")
    aid, severity, condition, active_key, peak, top, opened, returned = alert
    assert (severity, condition, active_key) == ("critical", "returned", None)
    assert peak == pytest.approx(225 / 6, rel=1e-5)
    assert json.loads(top)[0] == {"channel": "bearing_temp_c", "share": 1.0}
    assert opened < returned
    kinds = [k for (k,) in env.rows("SELECT kind FROM alert_events WHERE alert_id=? ORDER BY id", aid)]
    assert kinds == ["opened", "escalated", "returned"]
    # A retry of the escalating batch changes nothing.
    assert env.post("pump-01", hotter).json()["duplicates"] == 12
    assert env.count("alert_events") == 3


def test_shelved_asset_stores_scores_but_opens_no_alert(env) -> None:
    env.post("pump-01", readings(range(10)))
    env.execute("UPDATE assets SET shelved_until=?, shelve_reason='pump swap' WHERE asset_id='pump-01'", "2999-01-01 00:00:00.000000")
    r = env.post("pump-01", readings(range(10, 30), 5.0)).json()
    assert r["windows_scored"] == 10 and r["alerts_opened"] == 0
    assert env.count("alerts") == 0
    state = env.client.get("/v1/assets", headers=env.auth("maintenance")).json()["items"][0]["state"]
    assert state == "shelved"


def test_asset_states_normal_alerting_silent(env) -> None:
    import time

    now_idx = int(time.time()) // 120 * 2  # a recent even grid step
    t0 = (now_idx - 20) * PERIOD_S
    env.post("pump-01", readings(range(20), t0=t0, jitter_s=0))
    env.post("pump-02", readings(range(20), 3.0, t0=t0, jitter_s=0))  # score 9: warning
    env.post("pump-03", readings(range(10)))  # 2026-10-01: long silent
    items = {a["asset_id"]: a for a in env.client.get("/v1/assets", headers=env.auth("maintenance")).json()["items"]}
    assert items["pump-01"]["state"] == "normal"
    assert items["pump-02"]["state"] == "alerting" and items["pump-02"]["active_severity"] == "warning"
    assert items["pump-03"]["state"] == "silent"
    assert items["pump-01"]["warning"] == 4.0 and items["pump-01"]["threshold_version"] == 1


def test_asset_list_pages_with_a_cursor(env) -> None:
    for a in ("a-1", "a-2", "a-3"):
        env.post(a, readings(range(6)))
    page = env.client.get("/v1/assets?limit=2", headers=env.auth("maintenance")).json()
    assert [a["asset_id"] for a in page["items"]] == ["a-1", "a-2"] and page["next_cursor"]
    rest = env.client.get(f"/v1/assets?limit=2&cursor={page['next_cursor']}", headers=env.auth("maintenance")).json()
    assert [a["asset_id"] for a in rest["items"]] == ["a-3"] and rest["next_cursor"] is None


def test_scores_endpoint_range_contributions_and_pages(env) -> None:
    env.post("pump-01", [reading(i, 3.0, channel="current_a") for i in range(30)])
    h = env.auth("maintenance")
    all_ = env.client.get("/v1/assets/pump-01/scores", headers=h).json()
    assert len(all_["items"]) == 12  # ends 6, 8, ..., 28
    assert all_["items"][0]["contributions"]["current_a"] == pytest.approx(1.0)
    assert all_["items"][0]["score"] == pytest.approx(9 / 6, rel=1e-5)
    part = env.client.get("/v1/assets/pump-01/scores", params={"since": "2026-10-01T00:10:00Z", "until": "2026-10-01T00:20:00Z"}, headers=h).json()
    assert [p["window_end"] for p in part["items"]] == [f"2026-10-01T00:{m:02d}:00Z" for m in range(10, 20, 2)]
    p1 = env.client.get("/v1/assets/pump-01/scores", params={"limit": 10}, headers=h).json()
    p2 = env.client.get("/v1/assets/pump-01/scores", params={"limit": 10, "cursor": p1["next_cursor"]}, headers=h).json()
    assert [p["window_end"] for p in p1["items"] + p2["items"]] == [p["window_end"] for p in all_["items"]]
    assert env.client.get("/v1/assets/nope/scores", headers=h).status_code == 404
    bad = env.client.get("/v1/assets/pump-01/scores", params={"since": "2026-10-01T00:10:00"}, headers=h)
    assert bad.status_code == 422 and bad.json()["error"]["field"] == "query.since"


def test_scores_pages_skip_no_row_when_two_model_versions_scored_the_same_windows(env) -> None:
    """The page order is (window end, row id) and so is the cursor: with a second model
    version's scores of the same windows, paging with any page size returns every row once.
    (The cursor used to hold the window-end index alone and dropped the second version's row
    of the window a page ended on.)"""
    env.post("pump-01", readings(range(20)))
    env.execute(
        "INSERT INTO window_scores (asset_id, model_id, model_version, window_end_index, window_end_ms, score, contributions, "
        "threshold_version_id, created_at, rule_saw) SELECT asset_id, model_id, '2', window_end_index, window_end_ms, score + 1, "
        "contributions, threshold_version_id, created_at, rule_saw FROM window_scores"
    )
    h = env.auth("maintenance")
    whole = env.client.get("/v1/assets/pump-01/scores", headers=h).json()["items"]
    assert len(whole) == 14  # ends 6, 8, ..., 18, each by versions 1 and 2
    for size in (1, 2, 3, 5):
        got, cursor = [], None
        while True:
            params = {"limit": size, **({"cursor": cursor} if cursor else {})}
            page = env.client.get("/v1/assets/pump-01/scores", params=params, headers=h).json()
            got += page["items"]
            cursor = page["next_cursor"]
            if not cursor:
                break
        assert got == whole, size


def test_score_endpoint_scores_and_stores_nothing(env) -> None:
    centre = np.array(tiny_model.CENTER)
    scale = np.array(tiny_model.SCALE)
    windows = [np.tile(centre, (W, 1)), np.tile(centre + 2 * scale, (W, 1))]
    r = env.client.post("/v1/score", json={"windows": [w.tolist() for w in windows]}, headers=env.auth("machine"))
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["model_version"] == "1" and body["channels"] == list(tiny_model.CHANNELS)
    assert body["scores"] == pytest.approx([0.0, 4.0], abs=1e-5)
    assert sum(counts(env).values()) == 0
    short = env.client.post("/v1/score", json={"windows": [windows[0][:3].tolist()]}, headers=env.auth("machine"))
    assert short.status_code == 422 and short.json()["error"]["field"] == "body.windows[0]"


def test_a_new_model_version_scores_on_with_its_own_calibrated_thresholds(env) -> None:
    env.post("pump-01", readings(range(12)))
    tiny_model.build(env.settings.model_dir, version="2", warning=6.0, critical=30.0)
    r = env.client.post("/v1/models/reload", headers=env.auth("admin"))
    assert r.status_code == 200, r.text
    body = env.post("pump-01", readings(range(12, 24))).json()
    assert body["model_version"] == "2" and body["threshold_version"] == 2
    assert env.rows("SELECT version, warning, origin, model_version FROM threshold_versions ORDER BY version") == [
        (1, 4.0, "calibrated", "1"), (2, 6.0, "calibrated", "2")]
    versions = env.rows("SELECT model_version, COUNT(*) FROM window_scores GROUP BY model_version ORDER BY 1")
    assert versions == [("1", 3), ("2", 6)]  # v1: ends 6..10; v2 takes over from the next window on
