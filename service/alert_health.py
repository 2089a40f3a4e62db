"""Alert-system health: how the alert history scores against alarm-management benchmarks.

Pure functions over plain records (no database, no HTTP). The figures follow the spirit
of ANSI/ISA-18.2 / IEC 62682 and the EEMUA 191 benchmarks, as summarised in the trade
press (common practice, values from memory of those summaries, not from the standards'
text):

* alert rate: about one alarm per 10 minutes per operator position is the steady-state
  target, two is the most that stays manageable. We report alerts per asset-day and the
  fleet's average rate per 10 minutes per operator position (`operator_positions`, one by
  default: the whole fleet is watched from one desk).
* floods: more than 10 alarms in 10 minutes. We count fixed 10-minute periods (aligned to
  the epoch) in which more than 10 alerts opened across the fleet; the usual target is
  under 1% of periods in flood.
* chattering: an alarm that changes state 3 or more times in a minute. Our alerts change
  state at most once per window, and the rule needs at least off_m windows to return and
  on_k windows to re-open, so "3 changes in a minute" can never happen when windows are a
  minute or more apart. We scale the minute: an asset chatters when 3 or more condition
  changes (open or return) fall within max(60 s, 2 x (off_m + on_k) x window period),
  i.e. twice the rule's fastest open-return-open cycle. Target: none.
* stale: active for more than 24 hours. Counted for alerts still standing (not closed)
  at the end of the period whose condition has been active over 24 h; target: fewer than
  5 at any time.
* false alarms: of the alerts opened in the period and since closed, the share closed
  with outcome false_alarm (judged by when the alert happened, not when it was closed). The
  standards ask that every alarm needs a response; there is no agreed figure, so we flag
  more than half as "above_target" (our own working threshold, not from a standard).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Literal

import numpy as np

MINUTE_MS = 60_000
TEN_MIN_MS = 10 * MINUTE_MS
DAY_MS = 86_400_000

RATE_TARGET_PER_10MIN = 1.0  # per operator position, steady state
RATE_LIMIT_PER_10MIN = 2.0  # most that stays manageable
FLOOD_ALERTS = 10  # more than this many in one 10-minute period is a flood
FLOOD_SHARE_TARGET = 0.01  # under 1% of 10-minute periods in flood
CHATTER_CHANGES = 3  # state changes ...
CHATTER_MIN_HORIZON_MS = MINUTE_MS  # ... within a minute, scaled up to the rule's cadence
STALE_AFTER_MS = DAY_MS
STALE_TARGET = 5  # fewer than this standing at once
FALSE_ALARM_SHARE_TARGET = 0.5  # our own working threshold (see module docstring)

Verdict = Literal["within_target", "above_target", "beyond_limit", "no_data"]


@dataclass(frozen=True)
class AlertRecord:
    """One stored alert, times in epoch milliseconds."""

    alert_id: int
    asset_id: str
    opened_ms: int
    returned_ms: int | None  # None while the condition is active
    closed_ms: int | None  # None while not closed
    outcome: str | None  # set when closed


@dataclass(frozen=True)
class AssetSpan:
    """An asset and the time from which it was watched (its first reading / creation)."""

    asset_id: str
    since_ms: int


@dataclass(frozen=True)
class Figure:
    name: str
    value: float | None
    unit: str
    target: float | None
    limit: float | None
    verdict: Verdict
    basis: str  # where the benchmark comes from, in a few words
    detail: dict[str, object] = field(default_factory=dict)


@dataclass(frozen=True)
class HealthReport:
    since_ms: int
    until_ms: int
    assets: int
    asset_days: float
    alerts_opened: int
    figures: list[Figure]


def _verdict(value: float | None, target: float, limit: float | None = None, strict: bool = False) -> Verdict:
    """within_target when value <= target (< target when strict), beyond_limit over the limit."""
    if value is None:
        return "no_data"
    if value < target or (not strict and value == target):
        return "within_target"
    if limit is not None and value > limit:
        return "beyond_limit"
    return "above_target"


def asset_days(assets: Sequence[AssetSpan], since_ms: int, until_ms: int) -> float:
    """Days each asset was watched inside [since, until], summed over assets."""
    total = sum(max(0, until_ms - max(since_ms, a.since_ms)) for a in assets)
    return total / DAY_MS


def flood_periods(opened_ms: Sequence[int] | np.ndarray, since_ms: int, until_ms: int) -> tuple[int, int]:
    """(periods in flood, 10-minute periods overlapping [since, until)); periods aligned to the epoch."""
    first = since_ms // TEN_MIN_MS
    last = max(until_ms - 1, since_ms) // TEN_MIN_MS
    n_periods = int(last - first + 1) if until_ms > since_ms else 0
    t = np.asarray(opened_ms, dtype=np.int64)
    t = t[(t >= since_ms) & (t < until_ms)]
    if len(t) == 0 or n_periods == 0:
        return 0, n_periods
    _, counts = np.unique(t // TEN_MIN_MS, return_counts=True)
    return int(np.sum(counts > FLOOD_ALERTS)), n_periods


def chatter_horizon_ms(window_period_s: float, on_k: int, off_m: int) -> int:
    """The scaled "one minute": twice the rule's fastest open-return-open cycle, at least 60 s."""
    return int(max(CHATTER_MIN_HORIZON_MS, 2 * (off_m + on_k) * window_period_s * 1000))


def chattering_assets(alerts: Sequence[AlertRecord], horizon_ms: int, since_ms: int, until_ms: int) -> dict[str, int]:
    """Assets with >= CHATTER_CHANGES condition changes inside some horizon, and the most seen."""
    changes: dict[str, list[int]] = {}
    for a in alerts:
        for t in (a.opened_ms, a.returned_ms):
            if t is not None and since_ms <= t < until_ms:
                changes.setdefault(a.asset_id, []).append(t)
    out: dict[str, int] = {}
    for asset, times in changes.items():
        ts = np.sort(np.asarray(times, dtype=np.int64))
        # For each change, how many changes fall in [t, t + horizon].
        upto = np.searchsorted(ts, ts + horizon_ms, side="right")
        most = int(np.max(upto - np.arange(len(ts))))
        if most >= CHATTER_CHANGES:
            out[asset] = most
    return out


def stale_alerts(alerts: Sequence[AlertRecord], at_ms: int) -> list[AlertRecord]:
    """Alerts still standing (not closed) at `at_ms` whose condition has been active over 24 h."""
    return [
        a
        for a in alerts
        if a.opened_ms <= at_ms
        and (a.closed_ms is None or a.closed_ms > at_ms)
        and (a.returned_ms is None or a.returned_ms > at_ms)
        and at_ms - a.opened_ms > STALE_AFTER_MS
    ]


def health(
    alerts: Sequence[AlertRecord],
    assets: Sequence[AssetSpan],
    *,
    since_ms: int,
    until_ms: int,
    window_period_s: float,
    on_k: int,
    off_m: int,
    operator_positions: int = 1,
) -> HealthReport:
    """Score the alert history of [since, until) against the benchmarks (module docstring).

    `alerts` may include alerts opened before `since` (they matter for stale and chatter);
    rates count only alerts opened inside the period.
    """
    if until_ms <= since_ms:
        raise ValueError(f"until ({until_ms} ms) must be after since ({since_ms} ms)")
    if operator_positions < 1:
        raise ValueError(f"operator_positions must be >= 1, got {operator_positions}")
    inside = [a for a in alerts if since_ms <= a.opened_ms < until_ms]
    days = asset_days(assets, since_ms, until_ms)
    period_10min = (until_ms - since_ms) / TEN_MIN_MS
    figures: list[Figure] = []

    per_asset: dict[str, int] = {}
    for a in inside:
        per_asset[a.asset_id] = per_asset.get(a.asset_id, 0) + 1
    n_assets = len(assets)
    # The per-position 10-minute target spread over the assets one position watches, per day.
    per_day_target = RATE_TARGET_PER_10MIN * 144 * operator_positions / n_assets if n_assets else None
    per_day_limit = RATE_LIMIT_PER_10MIN * 144 * operator_positions / n_assets if n_assets else None
    rate_asset_day = len(inside) / days if days > 0 else None
    figures.append(
        Figure(
            "alerts_per_asset_day",
            rate_asset_day,
            "alerts per asset-day",
            per_day_target,
            per_day_limit,
            _verdict(rate_asset_day, per_day_target, per_day_limit) if per_day_target is not None else "no_data",
            "ISA-18.2 / EEMUA 191 one per 10 min per operator position, spread over the assets (common practice)",
            {"per_asset": dict(sorted(per_asset.items()))},
        )
    )
    rate_10min = len(inside) / period_10min / operator_positions
    figures.append(
        Figure(
            "alerts_per_10min_per_position",
            rate_10min,
            "alerts per 10 min per operator position",
            RATE_TARGET_PER_10MIN,
            RATE_LIMIT_PER_10MIN,
            _verdict(rate_10min, RATE_TARGET_PER_10MIN, RATE_LIMIT_PER_10MIN),
            "ISA-18.2 / EEMUA 191: about 1 acceptable, 2 manageable (common practice)",
            {"operator_positions": operator_positions},
        )
    )
    flooded, n_periods = flood_periods([a.opened_ms for a in alerts], since_ms, until_ms)
    flood_share = flooded / n_periods if n_periods else None
    figures.append(
        Figure(
            "share_of_periods_in_flood",
            flood_share,
            "fraction of 10-minute periods with more than 10 alerts opened",
            FLOOD_SHARE_TARGET,
            None,
            _verdict(flood_share, FLOOD_SHARE_TARGET, strict=True),
            "flood = more than 10 alarms in 10 minutes; under 1% of periods (common practice)",
            {"periods_in_flood": flooded, "periods": n_periods},
        )
    )
    horizon = chatter_horizon_ms(window_period_s, on_k, off_m)
    chatter = chattering_assets(alerts, horizon, since_ms, until_ms)
    figures.append(
        Figure(
            "chattering_assets",
            float(len(chatter)),
            "assets",
            0.0,
            None,
            _verdict(float(len(chatter)), 0.0),
            "3 or more state changes in a minute, the minute scaled to the rule's cadence (common practice)",
            {"horizon_s": horizon / 1000, "assets": chatter},
        )
    )
    stale = stale_alerts(alerts, until_ms)
    figures.append(
        Figure(
            "stale_alerts",
            float(len(stale)),
            "alerts active over 24 h and not closed, at the end of the period",
            float(STALE_TARGET),
            None,
            _verdict(float(len(stale)), float(STALE_TARGET), strict=True),
            "stale = active over 24 hours; fewer than 5 at any time (common practice)",
            {"alert_ids": [a.alert_id for a in stale]},
        )
    )
    closed = [a for a in inside if a.closed_ms is not None]
    false_alarms = sum(1 for a in closed if a.outcome == "false_alarm")
    fa_share = false_alarms / len(closed) if closed else None
    figures.append(
        Figure(
            "false_alarm_share",
            fa_share,
            "fraction of the period's closed alerts closed as false_alarm",
            FALSE_ALARM_SHARE_TARGET,
            None,
            _verdict(fa_share, FALSE_ALARM_SHARE_TARGET),
            "every alarm should need a response (ISA-18.2); the 0.5 line is our own working target",
            {"closed": len(closed), "false_alarms": false_alarms},
        )
    )
    return HealthReport(
        since_ms=since_ms,
        until_ms=until_ms,
        assets=n_assets,
        asset_days=days,
        alerts_opened=len(inside),
        figures=figures,
    )
