"""service.retune: the threshold preview's pure computations."""

from __future__ import annotations

from datetime import datetime, timezone

import numpy as np
import pytest

from service.alerting import AlertRule, count_alerts
from service.manifest import CalibrationScores, Manifest
from service.retune import (
    PastAlert,
    ProposedAlert,
    ScoreSeries,
    calibration_set,
    count_overlaps,
    expected_false_alarms_per_week,
    levels_for_budget,
    preview,
    propose_rule,
    would_open,
)
from service.thresholds import WEEK_S, CalibrationSet, threshold_for_budget

PERIOD_MS = 300_000  # one window end every 5 minutes
T0_MS = 1_780_000_000_000


def series(scores: list[float]) -> ScoreSeries:
    return ScoreSeries(T0_MS + PERIOD_MS * np.arange(len(scores), dtype=np.int64), np.asarray(scores, float))


RULE = AlertRule(warning=1.0, critical=3.0, on_k=2, on_n=3, off_m=2, deadband_frac=0.1)


def test_would_open_times_follow_the_rule():
    #        0    1    2    3    4    5    6    7    8    9
    scores = [0.1, 0.2, 1.5, 0.3, 2.0, 4.0, 0.5, 0.95, 0.8, 0.2]
    (alert,) = would_open(series(scores), RULE)
    # 2 of the last 3 at/above 1.0 first at index 4 (scores 1.5, 0.3, 2.0); critical needs
    # 2 of 3 >= 3.0, never reached (only index 5), so it stays a warning.
    assert alert.start_ms == T0_MS + 4 * PERIOD_MS
    assert alert.severity == "warning"
    assert alert.peak == 4.0 and alert.peak_at_ms == T0_MS + 5 * PERIOD_MS
    # Clear level 0.9: index 7 (0.95) is inside the deadband, so the run of 2 below 0.9 ends at 9.
    assert alert.end_ms == T0_MS + 9 * PERIOD_MS and alert.returned


def test_raising_the_warning_above_the_peak_opens_nothing():
    scores = [0.1, 1.5, 2.0, 1.8, 0.1, 0.1, 0.1]
    assert len(would_open(series(scores), RULE)) == 1
    assert would_open(series(scores), RULE.with_thresholds(2.5)) == []


def test_unreturned_alert_is_reported_open_to_the_end():
    (alert,) = would_open(series([0.1, 2.0, 2.0, 2.0]), RULE)
    assert not alert.returned and alert.end_ms == T0_MS + 3 * PERIOD_MS


def test_would_open_matches_count_alerts_on_random_series():
    rng = np.random.default_rng(3)
    s = rng.gamma(2.0, 0.4, size=2000)
    assert len(would_open(series(list(s)), RULE)) == count_alerts(s, RULE) > 0


def test_score_series_refuses_unordered_or_mismatched_input():
    with pytest.raises(ValueError, match="strictly increasing"):
        ScoreSeries(np.array([2, 1]), np.array([0.1, 0.2]))
    with pytest.raises(ValueError, match="one length"):
        ScoreSeries(np.array([1, 2, 3]), np.array([0.1, 0.2]))


def test_count_overlaps_by_outcome_with_touching_ends():
    proposed = [
        ProposedAlert(100, 200, "warning", 2.0, 150, True),
        ProposedAlert(300, 400, "critical", 5.0, 350, True),
        ProposedAlert(500, 600, "warning", 1.5, 550, False),
    ]
    past = [
        PastAlert(1, 200, 250, "false_alarm"),  # touches the first at 200
        PastAlert(2, 350, 360, "confirmed_fault"),  # inside the second
        PastAlert(3, 320, 330, "false_alarm"),  # also inside the second
        PastAlert(4, 601, 700, "confirmed_fault"),  # just after the third: no overlap
        PastAlert(5, 500, 600, None),  # not closed: not counted for any outcome
    ]
    assert count_overlaps(proposed, past, "false_alarm") == 2
    assert count_overlaps(proposed, past, "confirmed_fault") == 1
    assert count_overlaps(proposed, past, "planned_work") == 0


def _manifest(span_s: float, period_s: float = 60.0, stride: int = 5) -> Manifest:
    n = 2
    return Manifest.model_validate(
        {
            "model_id": "unit-model",
            "version": "1",
            "created_at": datetime(2026, 1, 1, tzinfo=timezone.utc),
            "channels": [{"name": "a_kpa", "unit": "kPa"}, {"name": "b_c", "unit": "degC"}],
            "sample_period_s": period_s,
            "window": 10,
            "stride": stride,
            "gap_policy": {"max_fill_steps": 2},
            "scaler": {"center": [0.0] * n, "scale": [1.0] * n},
            "score": {"method": "mean_squared"},
            "thresholds": {
                "warning": 1.0,
                "critical": 2.0,
                "method": "empirical",
                "calibration": {"windows": 0, "assets": 0, "span_s": span_s},
            },
            "alert_rule": {"on_k": 2, "on_n": 3, "off_m": 2, "deadband_frac": 0.1},
            "architecture": {
                "encoder": [{"hidden": 4}],
                "latent": 2,
                "decoder": [{"hidden": 4}],
                "dropout": 0.0,
                "parameters": 0,
                "flops_per_window": 0,
            },
            "training": {
                "data_sha256": "0" * 64,
                "assets": ["x"],
                "rows": 0,
                "windows_train": 0,
                "windows_validation": 0,
                "windows_calibration": 0,
                "excluded_periods": 0,
                "start": datetime(2026, 1, 1, tzinfo=timezone.utc),
                "end": datetime(2026, 1, 2, tzinfo=timezone.utc),
                "epochs_run": 0,
                "seed": 0,
            },
            "validation": {"val_loss": 0.0, "onnx_max_abs_error": 0.0, "onnx_score_rel_error": 0.0},
            "onnx_sha256": "0" * 64,
        }
    )


def _calibration(scores_by_asset: dict[str, list[float]]) -> CalibrationScores:
    return CalibrationScores.model_validate(
        {
            "model_id": "unit-model",
            "version": "1",
            "sample_period_s": 60.0,
            "stride": 5,
            "assets": {a: {"window_end_index": list(range(0, 5 * len(s), 5)), "score": s} for a, s in scores_by_asset.items()},
        }
    )


def test_calibration_set_uses_the_manifest_span_or_counts_windows():
    cal_scores = _calibration({"p1": [0.1, 0.2, 0.3], "p2": [0.4, 0.5]})
    cal = calibration_set(cal_scores, _manifest(span_s=7200.0))
    assert cal.span_s == 7200.0 and cal.window_period_s == 300.0
    assert [list(s) for s in cal.series] == [[0.1, 0.2, 0.3], [0.4, 0.5]]
    fallback = calibration_set(cal_scores, _manifest(span_s=0.0))
    assert fallback.span_s == 5 * 300.0
    with pytest.raises(ValueError, match="calibration scores are empty"):
        calibration_set(_calibration({"p1": []}), _manifest(span_s=1.0))


def _normal_calibration(weeks: float = 20.0, seed: int = 0) -> CalibrationSet:
    period_s = 300.0
    n = int(weeks * WEEK_S / period_s)
    rng = np.random.default_rng(seed)
    return CalibrationSet(series=[rng.gamma(2.0, 0.5, size=n)], span_s=n * period_s, window_period_s=period_s)


def test_levels_for_budget_keeps_the_ratio_and_the_budget():
    cal = _normal_calibration(weeks=2)
    rule = AlertRule(warning=2.0, critical=5.0, on_k=2, on_n=3, off_m=3)
    levels = levels_for_budget(cal, rule, 2.0)
    assert levels.warning == threshold_for_budget(cal, rule, 2.0).threshold
    assert levels.critical == pytest.approx(levels.warning * 2.5)
    assert levels.choice.method == "empirical"
    rate = expected_false_alarms_per_week(cal, rule, levels.warning)
    assert rate is not None and rate <= 2.0
    # A looser budget gives a lower level.
    assert levels_for_budget(cal, rule, 6.0).warning < levels.warning


def test_expected_false_alarms_fall_as_the_level_rises():
    cal = _normal_calibration(weeks=4)
    rule = AlertRule(warning=1.0, critical=1.0, on_k=2, on_n=3, off_m=3)
    rates = [expected_false_alarms_per_week(cal, rule, w) for w in (1.5, 2.5, 3.5, 5.0)]
    assert all(r is not None for r in rates)
    assert rates == sorted(rates, reverse=True) and rates[0] > rates[-1]


def test_expected_false_alarms_is_none_when_calibration_cannot_say():
    # Two scores: no tail fit possible, and no alert observed at a high level.
    cal = CalibrationSet(series=[np.array([0.1, 0.2])], span_s=600.0, window_period_s=300.0)
    assert expected_false_alarms_per_week(cal, RULE, 10.0) is None


def test_preview_compares_proposed_and_current_rules():
    scores = [0.1, 1.5, 1.6, 0.1, 0.1, 0.1, 2.8, 2.9, 0.1, 0.1, 0.1]
    s = series(scores)
    past = [
        PastAlert(1, T0_MS + 2 * PERIOD_MS, T0_MS + 4 * PERIOD_MS, "false_alarm"),
        PastAlert(2, T0_MS + 7 * PERIOD_MS, T0_MS + 9 * PERIOD_MS, "confirmed_fault"),
    ]
    higher = RULE.with_thresholds(2.0, 3.0)
    result = preview(s, higher, RULE, past, _normal_calibration(weeks=4))
    assert len(result.current) == 2 and len(result.proposed) == 1
    assert result.overlap_confirmed_fault == 1 and result.overlap_false_alarm == 0
    assert result.windows == len(scores)
    assert result.first_window_end_ms == T0_MS and result.last_window_end_ms == T0_MS + 10 * PERIOD_MS
    assert result.expected_false_alarms_per_week is not None
    assert result.current_expected_false_alarms_per_week is not None
    assert result.expected_false_alarms_per_week < result.current_expected_false_alarms_per_week
    empty = preview(series([]), higher, RULE, past, None)
    assert empty.proposed == [] and empty.first_window_end_ms is None and empty.expected_false_alarms_per_week is None


def test_propose_rule_levels_timing_and_refusals():
    current = AlertRule(warning=2.0, critical=3.0, on_k=3, on_n=5, off_m=6, deadband_frac=0.1)
    same = propose_rule(current)
    assert same.rule == current and same.budget is None
    by_value = propose_rule(current, warning=4.0).rule
    assert (by_value.warning, by_value.critical, by_value.on_k) == (4.0, 6.0, 3)  # ratio 1.5 kept
    assert propose_rule(current, warning=4.0, critical=9.0).rule.critical == 9.0
    timing = propose_rule(current, on_k=1, on_n=2, deadband_frac=0.0).rule
    assert (timing.warning, timing.on_k, timing.on_n, timing.off_m, timing.deadband_frac) == (2.0, 1, 2, 6, 0.0)
    cal = _normal_calibration(weeks=2)
    budget = propose_rule(current, false_alarms_per_week=2.0, on_k=2, on_n=3, cal=cal)
    assert budget.budget is not None
    assert budget.rule.warning == threshold_for_budget(cal, AlertRule(2.0, 3.0, 2, 3, 6, 0.1), 2.0).threshold
    assert budget.rule.critical == pytest.approx(budget.rule.warning * 1.5)
    for kwargs, words in [
        ({"warning": 1.0, "false_alarms_per_week": 1.0}, "not both"),
        ({"critical": 5.0}, "critical needs warning"),
        ({"warning": 5.0, "critical": 4.0}, "must be >= warning"),
        ({"on_k": 6}, "on_k <= on_n"),
        ({"false_alarms_per_week": 1.0}, "calibration scores"),
    ]:
        with pytest.raises(ValueError, match=words):
            propose_rule(current, **kwargs)
