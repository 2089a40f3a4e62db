"""Poison values: a finite reading far outside the model's plausible limits (1e300, 3e38,
1e39 written as JSON) is a 422 naming the reading, channel and value, stores nothing, and
leaves the asset to be scored again by the next normal batch. The limits are the rule in
service/manifest.py (centre +- 10,000 scales, derived from the scaler for the tiny model,
whose manifest predates them)."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import tiny_model
from readings_support import T0, counts, readings

from service.manifest import PLAUSIBLE_SCALES, load_manifest
from service.scoring import OnnxScorer

CH = "bearing_temp_c"
C = tiny_model.CHANNELS.index(CH)
HIGH = tiny_model.CENTER[C] + PLAUSIBLE_SCALES * tiny_model.SCALE[C]  # 10045 degC
LOW = tiny_model.CENTER[C] - PLAUSIBLE_SCALES * tiny_model.SCALE[C]
MARK = 12345.678  # stands in for the literal in the JSON text


def post_text(env, asset: str, batch: list[dict], literal: str):
    """Post `batch` with MARK replaced by `literal` as written, so 1e39 reaches the server as JSON text."""
    text = json.dumps({"readings": batch}).replace(repr(MARK), literal)
    assert literal in text
    return env.client.post(f"/v1/assets/{asset}/readings", content=text,
                           headers={**env.auth("machine"), "content-type": "application/json"})


def stored_scores(env, asset: str) -> list[float]:
    return [float(s) for (s,) in env.rows("SELECT score FROM window_scores WHERE asset_id = ? ORDER BY window_end_ms", asset)]


@pytest.mark.parametrize("literal", ["1e300", "-1e300", "3e38", "1e39", "-3.4028234663852886e38", repr(HIGH + 1.0), repr(LOW - 0.5)])
def test_a_poison_value_is_refused_stores_nothing_and_the_asset_is_scored_again(env, literal: str) -> None:
    assert env.post("pump-01", readings(range(0, 12))).status_code == 200
    before = counts(env)
    batch = readings(range(12, 18))
    batch[3]["values"][CH] = MARK
    r = post_text(env, "pump-01", batch, literal)
    assert r.status_code == 422, r.text
    err = r.json()["error"]
    assert err["field"] == f"body.readings[3].values.{CH}"
    assert repr(float(literal)) in err["message"] and CH in err["message"] and "null" in err["message"]
    assert counts(env) == before  # nothing of the batch was stored
    again = env.post("pump-01", readings(range(12, 24)))
    assert again.status_code == 200, again.text
    # Scored exactly as an asset that never saw the poison.
    clean = env.post("pump-02", readings(range(0, 24)))
    assert again.json()["gap_windows"] == 0 and again.json()["accepted"] == 12
    assert stored_scores(env, "pump-01") == stored_scores(env, "pump-02") and len(stored_scores(env, "pump-02")) == clean.json()["windows_scored"]


def test_a_value_just_inside_the_limit_is_stored_and_scores_finite(env) -> None:
    assert env.post("pump-01", readings(range(0, 12))).status_code == 200
    batch = readings(range(12, 18))
    batch[3]["values"][CH] = HIGH - 1.0
    r = env.post("pump-01", batch)
    assert r.status_code == 200 and r.json()["accepted"] == 6, r.text
    nxt = env.post("pump-01", readings(range(18, 30)))
    assert nxt.status_code == 200 and nxt.json()["windows_scored"] > 0
    scores = stored_scores(env, "pump-01")
    assert all(math.isfinite(s) for s in scores)
    # The window over it scores about (1e4)^2 / 36 (tiny model: mean squared scaled distance).
    assert max(scores) == pytest.approx(((HIGH - 1.0 - tiny_model.CENTER[C]) / tiny_model.SCALE[C]) ** 2 / 36, rel=1e-4)


def test_a_value_stored_before_the_limits_cannot_make_scoring_fail(env) -> None:
    """A reading stored by an older version (or under another model's limits) outside the
    limits is held at the limit when scored: the next batches score, finite."""
    assert env.post("pump-01", readings(range(0, 12))).status_code == 200
    (ts,) = env.rows("SELECT MAX(ts_ms) FROM readings WHERE asset_id = ?", "pump-01")[0]
    values = dict(readings([11])[0]["values"], **{CH: 3e38})
    env.execute('UPDATE readings SET "values" = ? WHERE asset_id = ? AND ts_ms = ?', json.dumps(values), "pump-01", ts)
    r = env.post("pump-01", readings(range(12, 24)))
    assert r.status_code == 200 and r.json()["windows_scored"] == 6, r.text
    assert all(math.isfinite(s) for s in stored_scores(env, "pump-01"))


def test_score_endpoint_refuses_poison_values(env) -> None:
    window = [list(tiny_model.CENTER) for _ in range(6)]
    for literal in ("1e300", "3e38", "1e39", repr(HIGH + 1.0)):
        w = [row[:] for row in window]
        w[2][C] = MARK
        text = json.dumps({"windows": [window, w]}).replace(repr(MARK), literal)
        r = env.client.post("/v1/score", content=text, headers={**env.auth("machine"), "content-type": "application/json"})
        assert r.status_code == 422, (literal, r.text)
        err = r.json()["error"]
        assert err["field"] == f"body.windows[1][2][{C}]" and CH in err["message"] and repr(float(literal)) in err["message"]
    w = [row[:] for row in window]
    w[2][C] = HIGH - 1.0
    ok = env.client.post("/v1/score", json={"windows": [w]}, headers=env.auth("machine"))
    assert ok.status_code == 200 and math.isfinite(ok.json()["scores"][0])


def test_the_scorer_holds_out_of_limit_values_at_the_limit(tiny_dir) -> None:
    folder = tiny_dir / "test-pumps" / "1"
    scorer = OnnxScorer(folder)
    base = np.tile(np.asarray(tiny_model.CENTER, np.float32), (1, 6, 1))
    poisoned = base.copy()
    poisoned[0, 2, C] = 3e38
    at_limit = base.copy()
    at_limit[0, 2, C] = np.float32(load_manifest(folder).plausible.high[C])
    got = scorer.score(np.concatenate([poisoned, at_limit]))
    assert np.all(np.isfinite(got.score)) and got.score[0] == got.score[1]


def test_replay_skips_a_refused_batch_reports_it_and_carries_on(env) -> None:
    from service.replay import AssetSeries, replay

    t = T0 + 60.0 * np.arange(40)
    vals = np.tile(np.asarray(tiny_model.CENTER), (40, 1))
    vals[15, C] = 1e300  # in the second batch of ten
    summary = replay(url="http://testserver", key=env.keys["machine"], channels=tiny_model.CHANNELS,
                     series={"pump-01": AssetSeries(t, vals)}, batch=10, progress=False, client=env.client,
                     sleep=lambda s: pytest.fail("retried a refused batch"))
    assert [(r.where, r.status) for r in summary.refused] == [("asset pump-01 readings 10..19", 422)]
    assert "body.readings[5].values.bearing_temp_c" in summary.refused[0].message and "1e+300" in summary.refused[0].message
    assert summary.accepted == 30 == env.count("readings") and summary.refused_readings == 10
    assert "1 batches (10 readings) refused and skipped" in summary.line()

