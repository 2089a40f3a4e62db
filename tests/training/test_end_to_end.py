"""A tiny training run on demo data through `kilter train`, checked through the exported model.

The run: 3 pumps x 9 days of the invented demo fleet with a fault plan of our own, events
excluded, a small model and a few epochs. The exported model, scored through the
service's ONNX Runtime path, must rank the labelled fault windows clearly above the normal
calibration windows (ROC-AUC via sklearn.metrics.roc_auc_score), and the calibrated warning
threshold must keep the normal calibration windows within the false-alarm budget when
replayed through service.alerting.
"""

from __future__ import annotations

import contextlib
import io
import json
from pathlib import Path

import numpy as np
import pytest

torch = pytest.importorskip("torch")
metrics = pytest.importorskip("sklearn.metrics")

from service import grid as G  # noqa: E402
from service.alerting import AlertRule, count_alerts  # noqa: E402
from service.cli import main as kilter  # noqa: E402
from service.manifest import load_calibration, load_manifest  # noqa: E402
from service.scoring import OnnxScorer  # noqa: E402
from service.thresholds import MIN_TAIL_PEAKS, WEEK_S, tail_peaks  # noqa: E402
from training import demo_data  # noqa: E402
from training.config import TrainConfig  # noqa: E402
from training.demo_data import PlannedFault  # noqa: E402
from training.logs import read_events, read_logs  # noqa: E402
from training.pipeline import event_windows  # noqa: E402

DAY = 86400.0
START = demo_data.DEFAULT_START_S
# Our own plan: one clear hydraulic fault, one mechanical, one sensor fault, a maintenance stop.
PLAN = [
    PlannedFault("pump-01", "cavitation", START + 2.4 * DAY, START + 2.4 * DAY + 5 * 3600, severity=0.6),
    PlannedFault("pump-02", "impeller_clog", START + 4.2 * DAY, START + 4.2 * DAY + 8 * 3600, severity=0.6),
    PlannedFault("pump-03", "bearing_wear", START + 5.0 * DAY, START + 6.5 * DAY, severity=0.6),
    PlannedFault("pump-03", "stuck_sensor", START + 1.5 * DAY, START + 1.5 * DAY + 6 * 3600, channel="flow_m3h", severity=0.5),
    PlannedFault("pump-02", "maintenance", START + 1.0 * DAY, START + 1.0 * DAY + 4 * 3600),
]
ARGS = [
    "--epochs", "4", "--epoch-windows", "2500", "--patience", "3",
    "--window", "30", "--stride", "5", "--train-stride", "3",
    "--hidden", "16", "--latent", "4", "--layers", "1", "--decoder-layers", "1", "--threads", "1", "--seed", "3",
    "--version", "e2e",
]  # fmt: skip


@pytest.fixture(scope="module")
def trained(tmp_path_factory: pytest.TempPathFactory) -> dict:
    root = tmp_path_factory.mktemp("e2e")
    demo = demo_data.generate(assets=3, days=9, seed=11, fault_plan=PLAN)
    readings, events = demo_data.write(demo, root / "data")
    out = root / "models"
    stdout = io.StringIO()
    with contextlib.redirect_stdout(stdout), contextlib.redirect_stderr(io.StringIO()):
        code = kilter(["train", "--data", str(readings), "--exclude", str(events), "--out", str(out), *ARGS])
    assert code == 0
    lines = stdout.getvalue().splitlines()
    assert len(lines) == 1  # stdout carries the model folder alone
    return {"folder": Path(lines[0]), "readings": readings, "events": events, "out": out}


def test_train_writes_a_complete_valid_model_folder(trained: dict) -> None:
    folder = trained["folder"]
    assert folder == trained["out"] / "booster-pumps" / "e2e"
    names = sorted(p.name for p in folder.iterdir())
    assert names == ["calibration_scores.json", "manifest.json", "model.onnx", "report"]
    m = load_manifest(folder)
    assert (m.window, m.stride, m.sample_period_s) == (30, 5, 60.0)
    assert m.channel_names == list(demo_data.CHANNELS)
    assert m.training.excluded_periods == len(PLAN) and m.training.assets == ["pump-01", "pump-02", "pump-03"]
    assert m.validation.onnx_score_rel_error <= 1e-4
    # Plausible limits from the training run: every value the trainer read lies inside them.
    values = np.concatenate([log.values for log in read_logs(trained["readings"]).assets.values()])
    assert m.plausible.source == "training"
    inside = (values >= np.asarray(m.plausible.low)) & (values <= np.asarray(m.plausible.high))
    assert np.all(inside | np.isnan(values))
    report = folder / "report"
    assert {"report.json", "report.md", "loss.png", "calibration.png", "example_1.png"} <= {p.name for p in report.iterdir()}
    figures = json.loads((report / "report.json").read_text())
    # 3 pumps x 9 days hold ~1,200 calibration windows: too few tail scores for a fit, so
    # the warning sits above the highest normal score and the model says it is provisional.
    cal = load_calibration(folder, m)
    peaks = tail_peaks(np.concatenate([np.asarray(s.score) for s in cal.assets.values()]))
    expected = "highest_normal" if peaks < MIN_TAIL_PEAKS else "pot"
    assert figures["thresholds"]["detail"]["warning"]["method"] in (expected, "empirical")
    assert (m.provisional is not None) == (expected == "highest_normal")
    assert not [p for p in trained["out"].rglob("*") if ".partial-" in p.name]


def _scorer_and_grids(trained: dict):  # type: ignore[no-untyped-def]
    folder = trained["folder"]
    scorer = OnnxScorer(folder, threads=1)
    m = scorer.manifest
    logs = read_logs(trained["readings"])
    grids = {}
    for name, log in logs.assets.items():
        g = G.align(log.times_s, log.values, m.sample_period_s)
        grids[name] = G.Grid(g.start, G.fill_gaps(g.values, m.gap_policy.max_fill_steps))
    return scorer, logs, grids


def test_exported_model_separates_labelled_faults_from_normal_windows(trained: dict) -> None:
    scorer, logs, grids = _scorer_and_grids(trained)
    m = scorer.manifest
    cal = load_calibration(trained["folder"], m)
    normal_windows = np.concatenate(
        [G.cut_windows(grids[a], np.array(s.window_end_index), m.window) for a, s in cal.assets.items()]
    )
    normal = scorer.score(normal_windows).score
    stored = np.concatenate([np.array(s.score) for s in cal.assets.values()])
    np.testing.assert_allclose(normal, stored, rtol=1e-4)  # shipped scores = the exported model's scores

    config = TrainConfig()
    config = type(config)(data=type(config.data)(window=m.window, stride=m.stride, max_fill_steps=m.gap_policy.max_fill_steps))
    faulty = event_windows(logs, read_events(trained["events"]), config)
    assert faulty is not None and set(faulty.kinds) == {"cavitation", "impeller_clog", "bearing_wear", "stuck_sensor"}
    fault = scorer.score(faulty.windows).score
    labels = np.r_[np.zeros(len(normal)), np.ones(len(fault))]
    auc = metrics.roc_auc_score(labels, np.r_[normal, fault])  # reference: sklearn.metrics.roc_auc_score
    ratio = float(np.median(fault) / np.median(normal))
    print(f"fault/normal median score ratio {ratio:.2f}, ROC-AUC {auc:.3f} ({len(fault)} fault, {len(normal)} normal windows)")
    assert auc >= 0.85
    assert ratio >= 2.0
    for kind in ("cavitation", "impeller_clog"):  # the hydraulic faults are gross: near-perfect
        k = fault[faulty.kinds == kind]
        assert metrics.roc_auc_score(np.r_[np.zeros(len(normal)), np.ones(len(k))], np.r_[normal, k]) >= 0.95


def test_warning_threshold_keeps_normal_calibration_windows_within_budget(trained: dict) -> None:
    m = load_manifest(trained["folder"])
    cal = load_calibration(trained["folder"], m)
    rule = AlertRule(
        warning=m.thresholds.warning,
        critical=m.thresholds.critical,
        on_k=m.alert_rule.on_k,
        on_n=m.alert_rule.on_n,
        off_m=m.alert_rule.off_m,
        deadband_frac=m.alert_rule.deadband_frac,
    )
    weeks = m.thresholds.calibration.span_s / WEEK_S
    alerts = sum(count_alerts(s.score, rule) for s in cal.assets.values())
    assert weeks > 0 and m.thresholds.warning_budget_per_week is not None
    assert alerts / weeks <= m.thresholds.warning_budget_per_week
    # the threshold is not vacuous: it sits inside the range a fault reaches
    assert m.thresholds.warning < m.thresholds.calibration.max_score * 10


def test_train_reports_bad_input_as_a_command_error(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    bad = tmp_path / "bad.csv"
    bad.write_text("timestamp,asset,flow_m3h\n2026-09-01T00:00:00Z,pump-01,abc\n", encoding="utf-8")
    code = kilter(["train", "--data", str(bad), "--out", str(tmp_path / "m"), "--epochs", "1"])
    err = capsys.readouterr().err
    assert code == 2 and "kilter: train:" in err and "bad.csv" in err
    assert not (tmp_path / "m").exists()
    code = kilter(["train", "--data", str(bad), "--out", str(tmp_path / "m"), "--hidden", "0"])
    assert code == 2 and "--hidden must be > 0" in capsys.readouterr().err
