"""Thresholds chosen as false-alarm budgets by replaying normal scores through the alert rule."""

from __future__ import annotations

import numpy as np
import pytest

torch = pytest.importorskip("torch")

from service.alerting import count_alerts  # noqa: E402
from service.manifest import CalibrationScores, Thresholds  # noqa: E402
from service.thresholds import WEEK_S  # noqa: E402
from training.calibrate import calibrate, choose_thresholds, per_asset_series  # noqa: E402
from training.config import CalibrationConfig, ModelConfig  # noqa: E402
from training.dataset import ArrayWindows  # noqa: E402
from training.model import Reconstructor  # noqa: E402

PERIOD_S = 600.0  # one window end every 10 min
WEEKS_PER_ASSET = 4
PER_WEEK = int(WEEK_S / PERIOD_S)


def normal_series(assets: int = 4, seed: int = 0) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Autocorrelated log-normal scores, like a reconstructor's on normal data (invented)."""
    rng = np.random.default_rng(seed)
    n = WEEKS_PER_ASSET * PER_WEEK
    out = {}
    for a in range(assets):
        ar = np.zeros(n)
        eps = rng.normal(0, 0.35, n)
        for i in range(1, n):
            ar[i] = 0.7 * ar[i - 1] + eps[i]
        out[f"pump-{a + 1:02d}"] = (np.arange(n, dtype=np.int64) * 10, np.exp(ar) * 0.03)
    return out


def replayed_per_week(series, rule, level: float) -> float:  # type: ignore[no-untyped-def]
    r = rule.with_thresholds(level, level)
    return sum(count_alerts(s, r) for _, s in series.values()) / (len(series) * WEEKS_PER_ASSET)


def test_warning_threshold_keeps_normal_scores_within_budget() -> None:
    series = normal_series()
    cfg = CalibrationConfig()
    span_s = len(series) * WEEKS_PER_ASSET * WEEK_S
    cal = choose_thresholds(series, span_s, PERIOD_S, cfg)
    # 16 asset-weeks x 0.25 = 4 allowed alerts: resolvable, so the replay chose it
    assert cal.warning.method == "empirical"
    assert replayed_per_week(series, cal.rule, cal.rule.warning) <= cfg.warning_budget_per_week
    # ... and it is the lowest such level: a little lower would exceed the budget
    assert replayed_per_week(series, cal.rule, cal.rule.warning * 0.9) > cfg.warning_budget_per_week
    # 16 x 0.05 = 0.8 allowed alerts: too rare to count, so the tail fit gave the critical level
    assert cal.critical.method == "pot" and cal.method == "pot"
    assert cal.rule.critical >= cal.rule.warning
    assert replayed_per_week(series, cal.rule, cal.rule.critical) <= replayed_per_week(series, cal.rule, cal.rule.warning)
    assert (cal.rule.on_k, cal.rule.on_n, cal.rule.off_m, cal.rule.deadband_frac) == (3, 5, 6, 0.1)
    t = Thresholds.model_validate(cal.thresholds().model_dump())
    assert t.calibration.windows == len(series) * WEEKS_PER_ASSET * PER_WEEK
    assert t.warning_budget_per_week == 0.25 and t.critical_budget_per_week == 0.05


def test_a_looser_budget_gives_a_lower_threshold() -> None:
    series = normal_series(seed=1)
    span_s = len(series) * WEEKS_PER_ASSET * WEEK_S
    strict = choose_thresholds(series, span_s, PERIOD_S, CalibrationConfig(warning_budget_per_week=0.25))
    loose = choose_thresholds(series, span_s, PERIOD_S, CalibrationConfig(warning_budget_per_week=2.0))
    assert loose.rule.warning < strict.rule.warning


def test_per_asset_series_are_in_time_order() -> None:
    scores = np.array([5.0, 1.0, 4.0, 2.0, 3.0])
    assets = np.array(["b", "a", "b", "a", "b"])
    ends = np.array([30, 20, 10, 10, 20])
    out = per_asset_series(scores, assets, ends, names=["a", "b"])
    assert list(out) == ["a", "b"]
    assert out["a"][0].tolist() == [10, 20] and out["a"][1].tolist() == [2.0, 1.0]
    assert out["b"][0].tolist() == [10, 20, 30] and out["b"][1].tolist() == [4.0, 3.0, 5.0]


def test_calibrate_scores_with_the_model_and_writes_a_valid_scores_file() -> None:
    torch.manual_seed(0)
    w, c = 8, 2
    model = Reconstructor(ModelConfig(hidden=4, latent=2), c, w, np.zeros(c), np.ones(c)).eval()
    rng = np.random.default_rng(0)
    n = 2 * 3 * 1008  # two assets, three weeks of 10-min windows each
    windows = rng.normal(size=(n, w, c))
    assets = np.repeat(np.array(["x", "y"]), n // 2)
    ends = np.tile(np.arange(n // 2) * 10, 2)[::-1].copy()  # reversed: calibrate must sort
    cal = calibrate(model, ArrayWindows(windows, assets, ends), 6 * WEEK_S, PERIOD_S, CalibrationConfig())
    assert cal.assets == ["x", "y"]
    for a in ("x", "y"):
        e, s = cal.series[a]
        assert np.all(np.diff(e) > 0) and len(s) == n // 2
    with torch.inference_mode():
        first = model(torch.from_numpy(windows[n // 2 - 1 : n // 2].astype(np.float32)))[2].item()
    assert cal.series["x"][1][0] == pytest.approx(first, rel=1e-6)  # x's earliest window is its last row
    f = CalibrationScores.model_validate_json(cal.scores_file("m", "1", 60.0, 10).model_dump_json())
    assert len(f.assets["y"].score) == n // 2
    assert sum(cal.false_alerts().values()) / 6 <= 0.25 + 1e-9  # replayed warning rate within budget
    with pytest.raises(ValueError, match="no calibration windows"):
        calibrate(model, ArrayWindows(windows[:0], assets[:0], ends[:0]), 1.0, PERIOD_S, CalibrationConfig())
