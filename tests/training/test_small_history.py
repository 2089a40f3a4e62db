"""A plant's first try: 2 pumps x 6 days of history is too little to calibrate on, and the
train must still succeed with a provisional model whose levels differ and whose report
says why and what to add (issue 12)."""

from __future__ import annotations

import contextlib
import io
import json
from pathlib import Path

import numpy as np
import pytest

torch = pytest.importorskip("torch")

from service.alerting import AlertRule, count_alerts  # noqa: E402
from service.cli import main as kilter  # noqa: E402
from service.manifest import load_calibration, load_manifest  # noqa: E402
from service.models_registry import validate_folder  # noqa: E402
from service.thresholds import METHOD_LABELS, MIN_TAIL_PEAKS, CalibrationSet, threshold_for_budget  # noqa: E402
from training import demo_data  # noqa: E402

SMALL = [
    "--epochs", "4", "--epoch-windows", "600", "--hidden", "8", "--latent", "3", "--layers", "1",
    "--decoder-layers", "1", "--threads", "1", "--version", "first-try",
]  # fmt: skip


@pytest.fixture(scope="module")
def first_try(tmp_path_factory: pytest.TempPathFactory) -> dict:
    root = tmp_path_factory.mktemp("small")
    readings, events = demo_data.write(demo_data.generate(assets=2, days=6, seed=7), root / "data")
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = kilter(["train", "--data", str(readings), "--exclude", str(events), "--out", str(root / "models"), *SMALL])
    assert code == 0, err.getvalue()
    return {"folder": Path(out.getvalue().strip()), "log": err.getvalue()}


def test_two_pumps_six_days_trains_a_provisional_model_with_distinct_levels(first_try: dict) -> None:
    m = load_manifest(first_try["folder"])
    t = m.thresholds
    assert m.provisional is not None
    assert t.critical > t.warning  # strictly: equal levels would never escalate
    assert t.warning_method == "highest_normal" and t.critical_method == "spaced" and t.method == "highest_normal"
    # What the levels rest on, in the manifest: the same count the calibration file holds.
    cal = load_calibration(first_try["folder"], m)
    pooled = np.concatenate([np.asarray(s.score) for s in cal.assets.values()])
    assert m.provisional.calibration_windows == len(pooled) == t.calibration.windows
    assert m.provisional.calibration_asset_days == pytest.approx(t.calibration.span_s / 86400, abs=1e-3)
    assert m.provisional.windows_needed > m.provisional.calibration_windows
    assert "more days of normal history per asset" in m.provisional.advice
    # The warning sits just above every normal calibration score, so replaying them opens nothing.
    assert t.warning > pooled.max()
    rule = AlertRule(t.warning, t.critical, m.alert_rule.on_k, m.alert_rule.on_n, m.alert_rule.off_m, m.alert_rule.deadband_frac)
    assert all(count_alerts(np.asarray(s.score), rule) == 0 for s in cal.assets.values())
    # The service accepts it as any model.
    assert validate_folder(first_try["folder"]).manifest.provisional == m.provisional


def test_the_report_and_the_log_say_why_and_spell_out_the_methods(first_try: dict) -> None:
    report = (first_try["folder"] / "report" / "report.md").read_text(encoding="utf-8")
    assert "**Provisional model.**" in report and "To settle the levels: add about" in report
    assert "not shown" in report and "| pot |" not in report and "| highest_normal |" not in report
    assert METHOD_LABELS["highest_normal"] in report and METHOD_LABELS["spaced"] in report
    figures = json.loads((first_try["folder"] / "report" / "report.json").read_text(encoding="utf-8"))
    assert figures["provisional"]["windows_needed"] > figures["provisional"]["calibration_windows"]
    log = first_try["log"]
    assert "PROVISIONAL model" in log and "(pot)" not in log
    assert f"warning level {load_manifest(first_try['folder']).thresholds.warning:.4g}: {METHOD_LABELS['highest_normal']}" in log


def test_too_few_tail_scores_fall_back_to_the_highest_normal_score() -> None:
    """Below MIN_TAIL_PEAKS excesses the tail fit is not tried (it used to raise with < 3)."""
    rng = np.random.default_rng(5)
    scores = rng.gamma(2.0, 1.0, size=120)  # 98% quantile: 3 excesses
    cal = CalibrationSet([scores], span_s=120 * 600.0, window_period_s=600.0)
    choice = threshold_for_budget(cal, AlertRule(1.0, 1.0, 3, 5, 6, 0.1), 0.05)
    assert choice.method == "highest_normal" and choice.threshold > scores.max()
    assert choice.detail["n_peaks"] < MIN_TAIL_PEAKS
    # Enough data: the tail fit is used as before.
    big = rng.gamma(2.0, 1.0, size=4000)
    fitted = threshold_for_budget(CalibrationSet([big], 4000 * 600.0, 600.0), AlertRule(1.0, 1.0, 3, 5, 6, 0.1), 0.05)
    assert fitted.method == "pot"
