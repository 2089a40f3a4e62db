"""Grid period, window and strides chosen from the data's own sampling interval (issue 13).

Synthetic skid logs (invented for these tests: three coupled channels with a slow duty
cycle and noise) at 5 s, 60 s and 10 min. The time defaults of training/config.py are
the bundled model's (one-hour window, a window every tenth of an hour at 60 s): on 60 s
data they must resolve to its steps (models/booster-pumps/1/manifest.json: window 60,
stride 10, gap fill 5), and a 5 s log must get a 5 s grid without any flag.
"""

from __future__ import annotations

import contextlib
import io
import json
from pathlib import Path

import numpy as np
import pytest

from training.config import DataConfig
from training.dataset import (
    WINDOW_STEPS_MAX,
    WINDOW_STEPS_MIN,
    data_period_s,
    median_interval_s,
    nice_period,
    resolve_data_config,
)
from training.logs import DataError, from_arrays

CHANNELS = ("flow_m3h", "discharge_kpa", "motor_c")
UNITS = {"flow_m3h": "m3/h", "discharge_kpa": "kPa", "motor_c": "degC"}
START_S = 1_790_000_000.0


def skid(period_s: float, hours: float, seed: int, jitter_s: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """Times (N,) and values (N, 3) of one invented skid sampled every `period_s` (+- jitter)."""
    rng = np.random.default_rng(seed)
    n = int(hours * 3600 / period_s)
    t = START_S + np.arange(n) * period_s + rng.uniform(-jitter_s, jitter_s, n)
    duty = np.sin(2 * np.pi * (t - START_S) / 1800.0) + 0.3 * np.sin(2 * np.pi * (t - START_S) / 420.0)
    flow = 40 + 8 * duty + rng.normal(0, 0.4, n)
    pressure = 700 - 2.5 * (flow - 40) ** 2 / 10 + rng.normal(0, 2.0, n)
    temp = 55 + 0.15 * flow + rng.normal(0, 0.2, n)
    return t, np.column_stack([flow, pressure, temp])


def logset(periods: dict[str, float], hours: float, jitter_s: float = 0.0):  # type: ignore[no-untyped-def]
    times, values = {}, {}
    for i, (asset, period) in enumerate(periods.items()):
        times[asset], values[asset] = skid(period, hours, seed=i, jitter_s=jitter_s)
    return from_arrays(times, values, CHANNELS, UNITS, source="<skid>")


def test_median_interval_reads_through_jitter_and_gaps() -> None:
    t, _ = skid(5.0, 2.0, seed=0, jitter_s=0.4)
    t = np.delete(t, np.arange(100, 400))  # a 25-minute outage does not move the median
    assert median_interval_s(t) == pytest.approx(5.0, abs=0.1)
    assert nice_period(4.97) == 5.0 and nice_period(60.4) == 60.0 and nice_period(0.25) == 0.25
    assert median_interval_s(np.array([1.0])) is None


def test_60s_logs_resolve_to_the_bundled_models_steps() -> None:
    bundled = json.loads((Path(__file__).parents[2] / "models/booster-pumps/1/manifest.json").read_text())
    d = resolve_data_config(logset({"a": 60.0, "b": 60.0}, 30.0, jitter_s=2.0), DataConfig())
    assert (d.period_s, d.window, d.stride, d.max_fill_steps) == (
        bundled["sample_period_s"],
        bundled["window"],
        bundled["stride"],
        bundled["gap_policy"]["max_fill_steps"],
    )
    assert d.train_stride == 2  # the bundle run's training stride (training/bundle.py uses the defaults)


def test_fast_and_slow_logs_get_windows_within_bounds_with_a_note() -> None:
    notes: list[str] = []
    fast = resolve_data_config(logset({"a": 5.0}, 12.0), DataConfig(), notes.append)
    assert fast.period_s == 5.0
    assert fast.window == WINDOW_STEPS_MAX  # one hour would be 720 points
    assert (fast.stride, fast.train_stride, fast.max_fill_steps) == (40, 8, 60)
    assert any("720 grid points; clamped to 240" in n and "--period-s" in n for n in notes)
    assert any("median sampling interval" in n for n in notes)

    notes.clear()
    slow = resolve_data_config(logset({"a": 600.0}, 24 * 10), DataConfig(), notes.append)
    assert slow.period_s == 600.0
    assert slow.window == WINDOW_STEPS_MIN  # one hour would be 6 points
    assert slow.stride == 4 and slow.max_fill_steps == 1
    assert any("6 grid points; clamped to 24" in n for n in notes)

    # What the user gives is kept as given.
    given = resolve_data_config(logset({"a": 5.0}, 2.0), DataConfig(period_s=10.0, window=30, stride=3))
    assert (given.period_s, given.window, given.stride, given.train_stride) == (10.0, 30, 3, 1)


def test_assets_logging_at_very_different_intervals_are_refused_by_name() -> None:
    logs = logset({"skid-a": 5.0, "skid-b": 60.0}, 6.0)
    with pytest.raises(DataError) as err:
        data_period_s(logs)
    text = str(err.value)
    assert "skid-a every 5 s" in text and "skid-b every 60 s" in text and "--period-s 60" in text
    # Given a period, they train on one grid.
    assert resolve_data_config(logs, DataConfig(period_s=60.0)).period_s == 60.0


def test_kilter_train_on_5s_data_picks_a_5s_grid_unasked(tmp_path: Path) -> None:
    pytest.importorskip("torch")
    from service.cli import main as kilter
    from service.manifest import load_manifest

    rows = ["timestamp,asset," + ",".join(CHANNELS)]
    for i, asset in enumerate(("skid-1", "skid-2")):
        t, v = skid(5.0, 36.0, seed=i, jitter_s=0.3)
        if asset == "skid-2":  # an invented overheating, labelled in --events for the check only
            hot = (t >= START_S + 30 * 3600) & (t < START_S + 32 * 3600)
            v[hot, 2] += 6.0
        stamps = np.datetime_as_string(np.round(t * 1000).astype("datetime64[ms]"), unit="ms", timezone="UTC")
        rows += [f"{s},{asset}," + ",".join(f"{x:.3f}" for x in row) for s, row in zip(stamps, v, strict=True)]
    data = tmp_path / "skid.csv"
    data.write_text("\n".join(rows) + "\n", encoding="utf-8")
    events = tmp_path / "events.csv"
    events.write_text("asset,start,end,kind\nskid-2,2026-09-22T20:13:20Z,2026-09-22T22:13:20Z,overheating\n", encoding="utf-8")
    out, err = io.StringIO(), io.StringIO()
    args = ["--hidden", "8", "--latent", "2", "--layers", "1", "--decoder-layers", "1", "--epochs", "1",
            "--epoch-windows", "128", "--threads", "1", "--version", "v5s", "--model-id", "skid"]  # fmt: skip
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = kilter(["train", "--data", str(data), "--out", str(tmp_path / "models"), "--events", str(events), *args])
    assert code == 0, err.getvalue()
    m = load_manifest(Path(out.getvalue().strip()))
    assert m.sample_period_s == 5.0
    assert (m.window, m.stride, m.gap_policy.max_fill_steps) == (WINDOW_STEPS_MAX, 40, 60)
    assert "grid period 5 s: the data's median sampling interval" in err.getvalue()
    # The honest check: one epoch of a tiny LSTM is no match for PCA, and the run says so.
    check = json.loads((Path(out.getvalue().strip()) / "report" / "report.json").read_text())["baseline_check"]
    assert [p["part"] for p in check["parts"]] == ["validation", "calibration"]
    assert check["baseline_as_good"] is True and "--latent" in check["advice"]
    assert "WARNING: a linear PCA baseline does as well as the LSTM" in err.getvalue()
    assert m.validation.extra["baseline_as_good"] == 1.0
    assert m.training.excluded_periods == 0  # --events are checked against, not excluded or fitted on
    assert check["separation"]["fault_windows"] > 0 and 0.0 <= check["separation"]["pca_roc_auc"] <= 1.0
    assert m.validation.extra["calibration_mse_pca"] == pytest.approx(check["parts"][1]["pca_mse"])
    report = (Path(out.getvalue().strip()) / "report" / "report.md").read_text()
    assert "## Against a PCA baseline" in report and "**WARNING" in report
