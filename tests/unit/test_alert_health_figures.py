"""service.alert_health: alert history against alarm-management benchmarks.

Benchmarks (ISA-18.2 / IEC 62682, EEMUA 191, as summarised in the trade press; common
practice): flood = more than 10 alarms in 10 minutes; chattering = 3 or more state changes
in a minute; stale = active over 24 hours; about one alarm per 10 minutes per operator
position is the target, two manageable.
"""

from __future__ import annotations

import pytest

from service.alert_health import (
    DAY_MS,
    MINUTE_MS,
    TEN_MIN_MS,
    AlertRecord,
    AssetSpan,
    asset_days,
    chatter_horizon_ms,
    chattering_assets,
    flood_periods,
    health,
    stale_alerts,
)

T0 = 1_780_000_200_000 - (1_780_000_200_000 % TEN_MIN_MS)  # aligned to a 10-minute period


def rec(i: int, asset: str, opened: int, returned: int | None = None, closed: int | None = None, outcome: str | None = None):
    return AlertRecord(i, asset, opened, returned, closed, outcome)


def test_flood_needs_more_than_ten_in_one_period():
    eleven = [T0 + i * 1000 for i in range(11)]
    assert flood_periods(eleven, T0, T0 + 3 * TEN_MIN_MS) == (1, 3)
    assert flood_periods(eleven[:10], T0, T0 + 3 * TEN_MIN_MS) == (0, 3)  # exactly 10 is not a flood
    # Eleven alerts straddling a period boundary: 6 and 5, no flood.
    straddle = [T0 + TEN_MIN_MS - 6000 + i * 1000 for i in range(11)]
    assert flood_periods(straddle, T0, T0 + 3 * TEN_MIN_MS) == (0, 3)
    # Alerts outside the range are ignored.
    assert flood_periods(eleven, T0 + TEN_MIN_MS, T0 + 3 * TEN_MIN_MS) == (0, 2)


def test_chatter_horizon_scales_with_the_rule():
    # 5-minute windows, k=3, m=6: the fastest open-return-open cycle is 9 windows = 45 min.
    assert chatter_horizon_ms(300.0, on_k=3, off_m=6) == 2 * 9 * 300_000
    # Fast windows cannot go below the one minute of the benchmark.
    assert chatter_horizon_ms(1.0, on_k=1, off_m=1) == MINUTE_MS


def test_chattering_counts_open_and_return_changes_inside_the_horizon():
    h = 10 * MINUTE_MS
    alerts = [
        rec(1, "p1", T0, T0 + 3 * MINUTE_MS),
        rec(2, "p1", T0 + 8 * MINUTE_MS),  # third change at 8 min: chatters
        rec(3, "p2", T0, T0 + 6 * MINUTE_MS),
        rec(4, "p2", T0 + 11 * MINUTE_MS),  # third change after the horizon: does not
    ]
    assert chattering_assets(alerts, h, T0, T0 + DAY_MS) == {"p1": 3}


def test_stale_alerts_are_standing_and_active_over_a_day():
    at = T0 + 2 * DAY_MS
    alerts = [
        rec(1, "p1", T0),  # active for 2 days, standing: stale
        rec(2, "p2", T0, closed=T0 + DAY_MS, outcome="planned_work"),  # closed: not standing
        rec(3, "p3", T0, returned=T0 + 3 * 3_600_000),  # returned: not active
        rec(4, "p4", at - DAY_MS + 1),  # active just under 24 h
    ]
    assert [a.alert_id for a in stale_alerts(alerts, at)] == [1]


def test_asset_days_counts_from_when_each_asset_was_watched():
    assets = [AssetSpan("p1", T0 - DAY_MS), AssetSpan("p2", T0 + DAY_MS // 2)]
    assert asset_days(assets, T0, T0 + DAY_MS) == pytest.approx(1.5)


def test_health_report_figures_and_verdicts():
    since, until = T0, T0 + DAY_MS
    assets = [AssetSpan("p1", T0 - DAY_MS), AssetSpan("p2", T0 - DAY_MS)]
    alerts = [rec(100 + i, "p1", T0 + 3_600_000 + i * 1000, T0 + 3_700_000 + i * 1000) for i in range(11)]  # a flood
    alerts += [
        rec(1, "p2", T0 - 2 * DAY_MS),  # stale, opened before the period
        rec(2, "p2", T0 + 5 * 3_600_000, T0 + 6 * 3_600_000, T0 + 7 * 3_600_000, "false_alarm"),
        rec(3, "p2", T0 + 8 * 3_600_000, T0 + 9 * 3_600_000, T0 + 10 * 3_600_000, "confirmed_fault"),
        # Opened and returned days before, closed inside the period: judged with its own period.
        rec(4, "p2", T0 - 3 * DAY_MS, T0 - 3 * DAY_MS + 3_600_000, T0 + 3_600_000, "false_alarm"),
    ]
    report = health(alerts, assets, since_ms=since, until_ms=until, window_period_s=300.0, on_k=3, off_m=6)
    fig = {f.name: f for f in report.figures}
    assert report.alerts_opened == 13 and report.asset_days == pytest.approx(2.0)
    assert fig["alerts_per_asset_day"].value == pytest.approx(6.5)
    assert fig["alerts_per_asset_day"].target == pytest.approx(72.0)  # 144 per position-day over 2 assets
    assert fig["alerts_per_asset_day"].verdict == "within_target"
    assert fig["alerts_per_10min_per_position"].value == pytest.approx(13 / 144)
    assert fig["share_of_periods_in_flood"].detail == {"periods_in_flood": 1, "periods": 144}
    assert fig["share_of_periods_in_flood"].verdict == "within_target"  # 1/144 < 1%
    # The flood's 22 changes within 1.5 h make p1 chatter.
    assert fig["chattering_assets"].value == 1 and fig["chattering_assets"].verdict == "above_target"
    assert fig["stale_alerts"].value == 1 and fig["stale_alerts"].detail["alert_ids"] == [1]
    assert fig["false_alarm_share"].value == pytest.approx(0.5)
    assert fig["false_alarm_share"].detail == {"closed": 2, "false_alarms": 1}
    assert fig["false_alarm_share"].verdict == "within_target"


def test_health_verdicts_beyond_limits_and_without_data():
    since, until = T0, T0 + TEN_MIN_MS
    assets = [AssetSpan("p1", T0)]
    busy = [rec(i, "p1", T0 + i * 1000) for i in range(25)]
    report = health(busy, assets, since_ms=since, until_ms=until, window_period_s=60.0, on_k=1, off_m=1)
    fig = {f.name: f for f in report.figures}
    assert fig["alerts_per_10min_per_position"].value == 25 and fig["alerts_per_10min_per_position"].verdict == "beyond_limit"
    assert fig["share_of_periods_in_flood"].value == 1.0 and fig["share_of_periods_in_flood"].verdict == "above_target"
    assert fig["false_alarm_share"].value is None and fig["false_alarm_share"].verdict == "no_data"
    many_positions = health(busy, assets, since_ms=since, until_ms=until, window_period_s=60.0, on_k=1, off_m=1, operator_positions=20)
    assert {f.name: f for f in many_positions.figures}["alerts_per_10min_per_position"].verdict == "above_target"
    with pytest.raises(ValueError, match="must be after since"):
        health([], assets, since_ms=until, until_ms=since, window_period_s=60.0, on_k=1, off_m=1)
