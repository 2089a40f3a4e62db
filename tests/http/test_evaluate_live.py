"""`kilter evaluate` on a labelled file and a live replay of the same file over HTTP, in
random batch sizes, raise the same alerts: both run the streaming core (service/stream.py),
ONNX Runtime and the one alert rule."""

from __future__ import annotations

import csv
import random
from pathlib import Path

import tiny_model
from readings_support import PERIOD_S, T0, reading
from service_env import start_env

STEPS = 400


def _write_file(path: Path) -> dict[str, list[dict]]:
    """Two assets: normal running with dropped readings, an outage, and two faulty stretches."""
    rng = random.Random(5)
    rows: dict[str, list[dict]] = {}
    faults = {"pump-01": [(60, 80, 3.0), (250, 262, 6.0)], "pump-02": [(150, 175, 2.5)]}
    for asset, spans in faults.items():
        out = []
        for i in range(STEPS):
            if rng.random() < 0.08 or 300 <= i < 312:  # dropped readings; an outage
                continue
            dev = next((d for a, b, d in spans if a <= i < b), 0.4 * rng.random())
            out.append(reading(i, dev, jitter_s=rng.randrange(0, 15)))
        rows[asset] = out
    with path.open("w", newline="") as f:
        w = csv.writer(f)
        w.writerow(["timestamp", "asset", *tiny_model.CHANNELS])
        for asset, out in rows.items():
            for r in out:
                w.writerow([r["ts"], asset, *(r["values"][c] for c in tiny_model.CHANNELS)])
    return rows


def test_evaluate_and_a_live_http_replay_raise_the_same_alerts(tmp_path, tiny_dir) -> None:
    from training.evaluate import evaluate, load_inputs

    data, events = tmp_path / "readings.csv", tmp_path / "events.csv"
    rows = _write_file(data)
    events.write_text(
        "asset,start,end,kind\n"
        f"pump-01,{T0 + 60 * PERIOD_S},{T0 + 80 * PERIOD_S},cavitation\n"
        f"pump-02,{T0 + 150 * PERIOD_S},{T0 + 175 * PERIOD_S},impeller_clog\n",
        encoding="utf-8",
    )
    folder = tiny_dir / "test-pumps" / "1"
    inputs = load_inputs(folder, data, events, units=dict(zip(tiny_model.CHANNELS, tiny_model.UNITS)))
    ev = evaluate(folder, inputs.series, inputs.events, progress=False)
    expected = {t.asset: [(round(a), round(b)) for a, b in t.alerts] for t in ev.model.tracks}
    assert sum(len(v) for v in expected.values()) >= 3  # the faults raise alerts at all

    gen = start_env(tmp_path / "live", tiny_dir)
    env = next(gen)
    try:
        rng = random.Random(11)
        for asset, out in rows.items():
            i = 0
            while i < len(out):
                n = rng.choice([1, 2, 7, 30, 113])
                assert env.post(asset, out[i : i + n]).status_code == 200
                i += n
        got: dict[str, list[tuple[int, int]]] = {}
        for asset in rows:
            items = env.client.get(f"/v1/alerts?asset={asset}", headers=env.auth("maintenance")).json()["items"]
            got[asset] = sorted((_s(a["opened_at"]), _s(a["returned_at"] or a["last_seen_at"])) for a in items)
    finally:
        gen.close()
    assert got == expected


def _s(iso: str) -> int:
    from datetime import datetime

    return round(datetime.fromisoformat(iso.replace("Z", "+00:00")).timestamp())
