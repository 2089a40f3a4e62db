"""Ingest on the bundled model: windows formed from stored readings, batch by batch, are
exactly the windows the trainer's one-shot windowing (service/grid.py over the whole log)
cuts, and their stored scores equal POST /v1/score of those windows."""

from __future__ import annotations

import math

import numpy as np
import pytest

from service import grid as G
from service.manifest import load_manifest


def test_streamed_windows_equal_one_shot_windowing(bundled_env) -> None:
    from training import demo_data

    env = bundled_env
    m = load_manifest(env.settings.model_dir / "booster-pumps" / "1")
    demo = demo_data.generate(assets=1, days=4 / 24, start=demo_data.DEMO_DAY_START_S, fault_plan=[], outages=False)
    t, v = demo.times_s["pump-01"], demo.values["pump-01"].copy()
    v[100:103, 2] = np.nan  # a short gap the fill policy bridges
    rows = [{"ts": float(ts), "values": {c: (None if math.isnan(x) else float(x)) for c, x in zip(demo.channels, r)}}
            for ts, r in zip(t, v)]
    for i in range(0, len(rows), 37):  # batches that do not line up with windows or strides
        assert env.post("pump-01", rows[i : i + 37]).status_code == 200

    g = G.align(t, v, m.sample_period_s)
    g = G.Grid(g.start, G.fill_gaps(g.values, m.gap_policy.max_fill_steps))
    ends = G.window_ends(g, m.window, m.stride)
    stored = env.rows("SELECT window_end_index, score FROM window_scores WHERE asset_id='pump-01' ORDER BY 1")
    assert [e for e, _ in stored] == ends.tolist() and len(ends) >= 15

    windows = G.cut_windows(g, ends, m.window)
    r = env.client.post("/v1/score", json={"windows": windows.tolist()}, headers=env.auth("machine"))
    assert r.status_code == 200 and r.json()["model_version"] == m.version
    assert [s for _, s in stored] == pytest.approx(r.json()["scores"], rel=1e-5)
    th = env.rows("SELECT warning, critical, on_k, on_n, off_m FROM threshold_versions WHERE asset_id='pump-01'")
    assert th == [(m.thresholds.warning, m.thresholds.critical, m.alert_rule.on_k, m.alert_rule.on_n, m.alert_rule.off_m)]
