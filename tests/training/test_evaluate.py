"""`kilter evaluate` end to end on a tiny model trained here: the service's own scoring and
alert rule, held-out windows only, baselines calibrated alike, the JSON shape of issue 5,
the plot, and clear errors for inputs that do not fit together."""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("torch", reason="training needs the train extra")

from service.alerting import replay  # noqa: E402
from service.cli import main  # noqa: E402
from service.grid import Grid, align, cut_windows, fill_gaps  # noqa: E402
from service.manifest import load_manifest  # noqa: E402
from service.scoring import OnnxScorer  # noqa: E402
from training import demo_data  # noqa: E402
from training.config import CalibrationConfig, DataConfig, FitConfig, ModelConfig, TrainConfig  # noqa: E402
from training.evaluate import baseline_splits, evaluate, load_inputs  # noqa: E402
from training.metrics import FIGURE_KEYS  # noqa: E402

DAY = 86400.0
TRAIN_DAYS = 3.0
START = demo_data.DEFAULT_START_S


@dataclass(frozen=True)
class Setup:
    readings: Path
    events: Path
    model: Path
    cut_s: float


@pytest.fixture(scope="module")
def setup(tmp_path_factory: pytest.TempPathFactory) -> Setup:
    from training.logs import read_events, read_logs
    from training.pipeline import train_logs

    root = tmp_path_factory.mktemp("evaluate")
    cut = START + TRAIN_DAYS * DAY
    plan = [
        demo_data.PlannedFault("pump-01", "maintenance", START + 1.2 * DAY, START + 1.4 * DAY, severity=0.5),
        demo_data.PlannedFault("pump-01", "cavitation", cut + 0.40 * DAY, cut + 0.55 * DAY, severity=1.0),
        demo_data.PlannedFault("pump-02", "impeller_clog", cut + 1.10 * DAY, cut + 1.50 * DAY, severity=1.0),
        demo_data.PlannedFault("pump-02", "maintenance", cut + 0.20 * DAY, cut + 0.35 * DAY, severity=0.5),
    ]
    demo = demo_data.generate(assets=2, days=TRAIN_DAYS + 2.0, seed=11, fault_plan=plan)
    readings, events = demo_data.write(demo, root / "data")
    logs = read_logs(readings)
    # Train only on the readings before the cut, as the README's evaluation run does.
    from training.logs import AssetLog, LogSet

    head = {
        a: AssetLog(a, log.times_s[log.times_s < cut], log.values[log.times_s < cut], log.lines[log.times_s < cut])
        for a, log in logs.assets.items()
    }
    train_set = LogSet(logs.source, logs.channels, logs.units, head, logs.sha256, logs.n_rows, logs.layout)
    config = TrainConfig(
        data=DataConfig(window=30, stride=5, train_stride=5, margin_s=1800.0),
        model=ModelConfig(hidden=8, latent=4, layers=1, decoder_layers=1),
        fit=FitConfig(epochs=2, batch_size=64, max_train_windows=600, max_validation_windows=300, threads=1),
        calibration=CalibrationConfig(),
        model_id="tiny",
        version="1",
    )
    outcome = train_logs(train_set, read_events(events), root / "models", config, progress=False, log=lambda _m: None)
    return Setup(readings, events, outcome.folder, cut)


def _run(setup: Setup, tmp: Path, *extra: str) -> int:
    return main(["evaluate", "--model", str(setup.model), "--data", str(setup.readings), "--events", str(setup.events), *extra])


def test_cli_writes_the_issue_json_shape_and_a_plot(setup: Setup, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "eval.json"
    assert _run(setup, tmp_path, "--baselines", "--json", str(out)) == 0
    printed = capsys.readouterr()
    assert "| kilter" in printed.out and "| pca" in printed.out and "F1 (PA)" in printed.out
    data = json.loads(out.read_text())
    assert set(data) == {"model", "baselines"}
    assert set(data["model"]) == set(FIGURE_KEYS)
    assert set(data["baselines"]) == {"robust_z", "pca", "iforest"}
    for row in [data["model"], *data["baselines"].values()]:
        assert set(row) == set(FIGURE_KEYS)
        assert all(v is None or isinstance(v, float) for v in row.values())
        assert 0.0 <= row["roc_auc"] <= 1.0
    png = out.with_suffix(".png").read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n" and len(png) > 10_000


def test_model_path_is_the_services_own_on_held_out_windows(setup: Setup) -> None:
    data = load_inputs(setup.model, setup.readings, setup.events)
    result = evaluate(setup.model, data.series, data.events, progress=False)
    m = load_manifest(setup.model)
    scorer = OnnxScorer(setup.model)
    training_end = m.training.end.timestamp()
    for series, track in zip(data.series, result.model.tracks, strict=True):
        # Every evaluated window lies wholly after the model's training data.
        first_points = track.end_s - (m.window - 1) * m.sample_period_s
        assert first_points.min() >= training_end
        ends = np.round(track.end_s / m.sample_period_s).astype(np.int64)
        assert np.all(ends % m.stride == 0)
        # Scores equal the service's path: grid, gap fill, cut, ONNX Runtime.
        g = align(series.times_s, series.values, m.sample_period_s)
        filled = Grid(g.start, fill_gaps(g.values, m.gap_policy.max_fill_steps))
        expected = scorer.score(cut_windows(filled, ends, m.window)).score
        np.testing.assert_allclose(track.score, expected, rtol=1e-6)
        # Alerts equal the service's rule with the manifest's levels and timing.
        spans = replay(track.score, result.model.rule)
        assert [(track.end_s[s.start], track.end_s[s.end]) for s in spans] == list(track.alerts)
    assert result.model.rule.warning == m.thresholds.warning
    assert (result.model.rule.on_k, result.model.rule.on_n, result.model.rule.off_m) == (
        m.alert_rule.on_k,
        m.alert_rule.on_n,
        m.alert_rule.off_m,
    )
    # Two faults in the evaluated days; the maintenance periods count as neither.
    assert result.events_in_span == 2
    assert sorted(o.kind for o in result.model.events.outcomes) == ["cavitation", "impeller_clog"]


def test_strong_faults_score_above_normal_windows(setup: Setup) -> None:
    """Even a two-epoch model ranks the severe held-out faults' windows above normal ones."""
    data = load_inputs(setup.model, setup.readings, setup.events)
    result = evaluate(setup.model, data.series, data.events, progress=False)
    assert result.model.windows.roc_auc > 0.7
    assert result.model.windows.abnormal_windows > 0


def test_baselines_fit_on_the_models_training_cut_and_share_its_timing(setup: Setup) -> None:
    data = load_inputs(setup.model, setup.readings, setup.events)
    m = load_manifest(setup.model)
    splits = baseline_splits(data)
    assert len(splits.train) > 0
    # The calibration split lies inside the training stretch, like the model's.
    assert 0 < splits.calibration_span_s <= (m.training.end - m.training.start).total_seconds() * len(m.training.assets)
    assert sum(len(s) for s in splits.calibration_series) == m.training.windows_calibration
    result = evaluate(
        setup.model, data.series, data.events, baselines=["pca", "robust_z"], baseline_splits=lambda: splits, progress=False
    )
    for r in result.baselines.values():
        assert (r.rule.on_k, r.rule.on_n, r.rule.off_m, r.rule.deadband_frac) == (
            m.alert_rule.on_k,
            m.alert_rule.on_n,
            m.alert_rule.off_m,
            m.alert_rule.deadband_frac,
        )
        assert r.warning > 0 and r.critical >= r.warning
        assert r.windows.windows == result.model.windows.windows


def test_events_for_an_unknown_asset_are_refused(setup: Setup, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    events = tmp_path / "events.csv"
    events.write_text("asset,start,end,kind\npump-09,2026-09-04T10:00:00Z,2026-09-04T12:00:00Z,spikes\n")
    code = main(["evaluate", "--model", str(setup.model), "--data", str(setup.readings), "--events", str(events)])
    assert code == 2
    assert "pump-09" in capsys.readouterr().err


def test_a_unit_the_model_was_not_trained_on_is_refused(setup: Setup, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code = _run(setup, tmp_path, "--units", "flow_m3h=l/s")
    err = capsys.readouterr().err
    assert code == 2 and "flow_m3h" in err and "m3/h" in err


def test_a_stretch_with_no_window_says_so(setup: Setup, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code = _run(setup, tmp_path, "--from", "2027-01-01T00:00:00Z")
    assert code == 2 and "no window to evaluate" in capsys.readouterr().err


def test_unknown_baseline_is_refused(setup: Setup, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code = _run(setup, tmp_path, "--baselines", "pca,lstm2")
    assert code == 2 and "lstm2" in capsys.readouterr().err


def test_missing_channel_is_named(setup: Setup, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    lines = setup.readings.read_text().splitlines()
    cols = lines[0].split(",")
    drop = cols.index("vibration_mm_s")
    short = tmp_path / "short.csv"
    short.write_text("\n".join(",".join(c for i, c in enumerate(line.split(",")) if i != drop) for line in lines[:200]) + "\n")
    code = main(["evaluate", "--model", str(setup.model), "--data", str(short), "--events", str(setup.events)])
    assert code == 2 and "vibration_mm_s" in capsys.readouterr().err


def test_a_looser_budget_lowers_the_level(setup: Setup) -> None:
    data = load_inputs(setup.model, setup.readings, setup.events)
    m = load_manifest(setup.model)
    default = evaluate(setup.model, data.series, data.events, progress=False)
    loose = evaluate(setup.model, data.series, data.events, progress=False, budget_per_week=20.0)
    assert loose.budget_per_week == 20.0 and default.budget_per_week == m.thresholds.warning_budget_per_week
    assert loose.model.warning <= default.model.warning
    high = lambda e: sum(int(np.sum(t.score >= e.model.warning)) for t in e.model.tracks)  # noqa: E731
    assert high(loose) >= high(default)
    # The critical level keeps its ratio to the warning level.
    assert loose.model.critical / loose.model.warning == pytest.approx(m.thresholds.critical / m.thresholds.warning)


@pytest.mark.parametrize("days", [1.0, 8.0])
def test_the_plot_date_axis_labels_distinct_ticks(days: float) -> None:
    """A one-day plot used to label every tick with the same month-day."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from training.evaluate import time_axis

    t0 = np.datetime64("2026-10-05T00:00:00")
    t = (t0 + np.arange(0, int(days * 86400), 600).astype("timedelta64[s]")).astype("datetime64[ms]").astype(object)
    fig, ax = plt.subplots()
    ax.plot(t, np.arange(len(t)))
    time_axis(ax)
    fig.canvas.draw()
    labels = [x.get_text() for x in ax.get_xticklabels() if x.get_text()]
    plt.close(fig)
    assert len(labels) >= 3 and len(set(labels)) == len(labels)
