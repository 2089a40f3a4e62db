"""Event-wise and window-level detection figures (training/metrics.py) on hand-worked cases."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from training.metrics import (
    Track,
    average_precision,
    event_scores,
    f1_score,
    point_adjust,
    roc_auc,
    window_labels,
    window_scores,
)

H = 3600.0
PERIOD = 600.0  # time between window ends in these cases


@dataclass(frozen=True)
class Ev:
    asset: str
    start_s: float
    end_s: float
    kind: str


def _track(alerts: list[tuple[float, float]], hours: float = 168.0, asset: str = "p1") -> Track:
    ends = np.arange(0.0, hours * H, PERIOD)
    return Track(asset, ends, np.zeros(len(ends)), alerts)


def test_caught_fault_gives_full_precision_recall_and_its_delay() -> None:
    ev = Ev("p1", 10 * H, 14 * H, "cavitation")
    res = event_scores([_track([(11 * H, 15 * H)])], [ev], PERIOD, tolerance_s=H)
    assert (res.precision, res.recall, res.f1) == (1.0, 1.0, 1.0)
    assert res.median_delay_s == res.worst_delay_s == H
    assert res.false_alarms == 0


def test_alert_after_the_fault_counts_only_within_the_tolerance() -> None:
    ev = Ev("p1", 10 * H, 14 * H, "spikes")
    inside = event_scores([_track([(14.5 * H, 16 * H)])], [ev], PERIOD, tolerance_s=H)
    assert inside.recall == 1.0 and inside.precision == 1.0
    outside = event_scores([_track([(15.5 * H, 16 * H)])], [ev], PERIOD, tolerance_s=H)
    assert outside.recall == 0.0 and outside.precision == 0.0 and outside.false_alarms == 1
    assert outside.f1 == 0.0
    assert math.isnan(outside.median_delay_s)


def test_alert_open_before_the_fault_has_zero_delay() -> None:
    ev = Ev("p1", 10 * H, 14 * H, "bearing_wear")
    res = event_scores([_track([(8 * H, 12 * H)])], [ev], PERIOD, tolerance_s=0.0)
    assert res.recall == 1.0 and res.worst_delay_s == 0.0


def test_false_alarm_rate_is_per_asset_week_of_scored_windows() -> None:
    # Two assets x one week each, three alerts matching nothing -> 1.5 per asset-week.
    tracks = [_track([(1 * H, 2 * H), (50 * H, 51 * H)], asset="p1"), _track([(70 * H, 71 * H)], asset="p2")]
    res = event_scores(tracks, [], PERIOD, tolerance_s=H)
    assert res.false_alarms == 3
    assert res.false_alarms_per_asset_week == pytest.approx(1.5)
    assert math.isnan(res.recall)


def test_alert_on_planned_work_is_neither_true_nor_false() -> None:
    evs = [Ev("p1", 10 * H, 20 * H, "maintenance"), Ev("p1", 100 * H, 101 * H, "stuck_sensor")]
    res = event_scores([_track([(12 * H, 13 * H), (100 * H, 102 * H)])], evs, PERIOD, tolerance_s=0.0)
    assert res.alerts == 1 and res.false_alarms == 0 and res.precision == 1.0
    assert res.recall == 1.0  # maintenance is not a fault to catch


def test_fault_outside_the_replayed_stretch_is_not_a_miss_and_other_assets_do_not_match() -> None:
    evs = [Ev("p1", 500 * H, 501 * H, "spikes"), Ev("p2", 10 * H, 11 * H, "spikes"), Ev("p1", 30 * H, 31 * H, "spikes")]
    res = event_scores([_track([(10 * H, 11 * H)])], evs, PERIOD, tolerance_s=0.0)
    assert len(res.outcomes) == 1  # only p1's fault at 30 h lies in p1's week
    assert res.recall == 0.0 and res.false_alarms == 1
    assert res.recall_by_kind() == {"spikes": (0, 1)}


def test_two_alerts_on_one_fault_are_both_true_and_the_earliest_sets_the_delay() -> None:
    ev = Ev("p1", 10 * H, 20 * H, "impeller_clog")
    res = event_scores([_track([(12 * H, 13 * H), (15 * H, 16 * H)])], [ev], PERIOD, tolerance_s=0.0)
    assert res.true_alerts == 2 and res.precision == 1.0 and res.median_delay_s == 2 * H


def test_negative_tolerance_is_refused() -> None:
    with pytest.raises(ValueError, match="tolerance_s"):
        event_scores([], [], PERIOD, tolerance_s=-1.0)


def test_window_labels_mark_windows_touching_a_fault_and_drop_planned_work() -> None:
    ends = np.array([0.0, 60.0, 120.0, 180.0, 240.0, 300.0])
    # Windows of 3 points at 60 s: the window ending at e covers e-120 .. e.
    evs = [Ev("p1", 200.0, 210.0, "spikes"), Ev("p1", 0.0, 10.0, "maintenance")]
    abnormal, keep = window_labels(ends, window_span_s=180.0, sample_period_s=60.0, events=evs)
    assert abnormal.tolist() == [False, False, False, False, True, True]
    assert keep.tolist() == [False, False, False, True, True, True]  # 120 still covers t=0


def test_roc_auc_hand_worked() -> None:
    # Pairs (pos, neg): (0.35 vs 0.1) win, (0.35 vs 0.4) lose, (0.8 vs both) win -> 3/4.
    assert roc_auc([0, 0, 1, 1], [0.1, 0.4, 0.35, 0.8]) == pytest.approx(0.75)
    assert roc_auc([0, 1, 0, 1], [0.5, 0.5, 0.5, 0.5]) == pytest.approx(0.5)
    assert math.isnan(roc_auc([1, 1], [0.2, 0.3]))


def test_average_precision_hand_worked() -> None:
    # Ranked 0.8(+) 0.4(-) 0.35(+) 0.1(-): recall steps 0.5 at P=1 and 0.5 at P=2/3.
    assert average_precision([0, 0, 1, 1], [0.1, 0.4, 0.35, 0.8]) == pytest.approx(0.5 + 0.5 * 2 / 3)
    # A tie between a positive and a negative is one threshold: P = 1/2 at recall 1.
    assert average_precision([1, 0], [0.3, 0.3]) == pytest.approx(0.5)


def test_scores_with_nan_are_refused() -> None:
    with pytest.raises(ValueError, match="NaN"):
        roc_auc([0, 1], [0.1, float("nan")])


def test_point_adjust_fills_a_segment_once_any_point_is_hit() -> None:
    y = np.array([0, 1, 1, 1, 0, 1, 1], bool)
    p = np.array([0, 0, 1, 0, 0, 0, 0], bool)
    assert point_adjust(y, p).astype(int).tolist() == [0, 1, 1, 1, 0, 0, 0]
    assert f1_score(y, p) == pytest.approx(2 * 1 / (5 + 1))
    assert f1_score(y, point_adjust(y, p)) == pytest.approx(2 * 3 / (5 + 3))


def test_point_adjustment_flatters_a_random_score() -> None:
    """The effect Kim et al. (AAAI 2022, arXiv:2109.05257) warn about, reproduced here:
    random scores over a long labelled segment get a high adjusted F1 and a low plain one."""
    rng = np.random.default_rng(0)
    y = np.zeros(2000, bool)
    y[500:900] = True
    y[1400:1800] = True
    s = rng.random(2000)
    ws = window_scores([y], [s], warning=0.99)
    assert ws.f1 < 0.1
    assert ws.f1_point_adjusted > 0.9
    assert 0.4 < ws.roc_auc < 0.6


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.booleans(), st.booleans()), min_size=1, max_size=60))
def test_point_adjusted_f1_never_below_plain_f1(pairs: list[tuple[bool, bool]]) -> None:
    y = np.array([a for a, _ in pairs], bool)
    p = np.array([b for _, b in pairs], bool)
    assert f1_score(y, point_adjust(y, p)) >= f1_score(y, p)


def test_window_scores_pool_assets_but_adjust_per_asset() -> None:
    # The labelled run ends asset 1 and starts asset 2: adjusting must not join them.
    y1, s1 = np.array([0, 0, 1, 1], bool), np.array([0.1, 0.1, 0.1, 0.9])
    y2, s2 = np.array([1, 1, 0, 0], bool), np.array([0.1, 0.1, 0.1, 0.1])
    ws = window_scores([y1, y2], [s1, s2], warning=0.5)
    # asset 1's segment becomes fully detected (2 TP), asset 2's stays missed: F1 = 4/(4+2).
    assert ws.f1_point_adjusted == pytest.approx(4 / 6)
    assert ws.f1 == pytest.approx(2 / (4 + 1))
    assert ws.windows == 8 and ws.abnormal_windows == 4
