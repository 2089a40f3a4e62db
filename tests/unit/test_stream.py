"""The streaming core (service/stream.py): windows never depend on how readings are batched.

The property tests feed one asset's readings (dropped readings, outages, duplicates, and
readings arriving out of order) through the core in random splits and compare everything
the core decides: stored readings, scored windows and their contents, gap records, the
windows the alert rule sees, and the alerts it raises.
"""

from __future__ import annotations

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from service import grid
from service.alerting import AlertRule, replay
from service.stream import MemoryAsset, StreamSpec, replay_series

SPEC = StreamSpec(period_s=60.0, window=6, stride=2, max_fill_steps=2, hold_steps=4, lateness_windows=3)
RULE = AlertRule(warning=1.0, critical=4.0, on_k=2, on_n=3, off_m=2, deadband_frac=0.1)
EXAMPLES = 400  # per property: about 6 s each on a quiet machine here
T0_MS = 1_790_812_800_000


def window_score(w: np.ndarray) -> float:
    """A pure stand-in for the model: the mean squared value of the window."""
    return float(np.mean(np.square(w)))


def outcome(asset: MemoryAsset, plans: list) -> dict:
    """Everything the core decided, in a comparable form."""
    windows: dict[int, float] = {}
    seen: list[tuple[int, float]] = []
    for p in plans:
        if not len(p.ends):
            continue
        scores = [window_score(w) for w in p.windows(SPEC.window)]
        windows.update(zip(p.ends.tolist(), scores))
        seen += [(e, s) for e, s, saw in zip(p.ends.tolist(), scores, p.rule_saw.tolist()) if saw]
    spans = replay([s for _, s in seen], RULE)
    alerts = [(seen[a.start][0], seen[a.end][0], a.severity, a.returned) for a in spans]
    return {
        "readings": (asset.ts_ms.tolist(), np.nan_to_num(asset.values, nan=-1e9).round(9).tolist()),
        "windows": {e: round(s, 9) for e, s in windows.items()},
        "rule_saw": [e for e, _ in seen],
        "gaps": sorted(asset.gap_ends),
        "alerts": alerts,
    }


def post_all(ts_ms: np.ndarray, values: np.ndarray, cuts: list[int]) -> dict:
    asset = MemoryAsset(SPEC, values.shape[1])
    plans = []
    bounds = [0, *sorted(set(c for c in cuts if 0 < c < len(ts_ms))), len(ts_ms)]
    for a, b in zip(bounds[:-1], bounds[1:]):
        plans.append(asset.post(ts_ms[a:b], values[a:b])[0])
    return outcome(asset, plans)


@st.composite
def history(draw: st.DrawFn, *, within_hold: bool) -> tuple[np.ndarray, np.ndarray, list[int]]:
    """(ts_ms in arrival order, values (N, 2), cut points)."""
    n = draw(st.integers(10, 70))
    keep = draw(st.lists(st.booleans(), min_size=n, max_size=n))  # dropped readings
    steps = [i for i in range(n) if keep[i] or i < 2]
    if draw(st.booleans()):  # an outage longer than the fill
        a = draw(st.integers(0, n - 1))
        steps = [i for i in steps if not a <= i < a + draw(st.integers(3, 15))] or [0]
    level = draw(st.lists(st.sampled_from([0.0, 0.5, 1.5, 3.0]), min_size=n, max_size=n))
    ts = np.array([T0_MS + i * 60_000 + draw(st.integers(-20_000, 20_000)) for i in steps], dtype=np.int64)
    vals = np.array([[level[i], (level[i] if draw(st.booleans()) else np.nan)] for i in steps], dtype=np.float64)
    idx = np.asarray(steps)
    if within_hold:
        # Each reading arrives while the newest before it is less than hold_steps ahead of it.
        jitter = np.array(draw(st.lists(st.integers(0, SPEC.hold_steps - 2), min_size=len(idx), max_size=len(idx))))
        order = np.argsort(idx + jitter, kind="stable")
    else:
        order = np.array(draw(st.permutations(list(range(len(idx))))))
    ts, vals = ts[order], vals[order]
    dup = draw(st.lists(st.integers(0, len(ts) - 1), max_size=5))  # resent readings, later
    if dup:
        at = sorted(dup)
        ts = np.concatenate([ts, ts[at]])
        vals = np.concatenate([vals, vals[at]])
    cuts = draw(st.lists(st.integers(1, max(1, len(ts) - 1)), max_size=8))
    return ts, vals, cuts


@settings(max_examples=EXAMPLES, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(history(within_hold=True))
def test_any_split_within_the_hold_equals_one_post_and_the_time_ordered_replay(case) -> None:
    ts, vals, cuts = case
    split = post_all(ts, vals, cuts)
    single = post_all(ts, vals, [])
    assert split == single
    # Evaluate's replay: the readings in time order, in batches of another size.
    order = np.argsort(ts, kind="stable")
    uniq = np.unique(ts[order], return_index=True)[1]
    t_sorted, v_sorted = ts[order][uniq], vals[order][uniq]
    plans: list = []
    asset = replay_series(SPEC, t_sorted / 1000.0, v_sorted, batch=7, on_plan=plans.append)
    assert outcome(asset, plans) == single


@settings(max_examples=EXAMPLES, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(history(within_hold=False))
def test_any_split_of_any_arrival_order_equals_one_post(case) -> None:
    """Readings late past the hold may leave other windows than a time-ordered post would,
    but never other windows for another cut of the same arrival sequence."""
    ts, vals, cuts = case
    assert post_all(ts, vals, cuts) == post_all(ts, vals, [])


def test_the_window_after_a_cut_is_scored() -> None:
    """Grid steps 0-9 then 11-20: the window ending at 10 (step 10 filled from 9) is scored."""
    spec = StreamSpec(60.0, 6, 2, 2)
    steps = [*range(10), *range(11, 21)]
    ts = np.array([T0_MS + i * 60_000 for i in steps], dtype=np.int64)
    vals = np.ones((len(steps), 1))
    asset = MemoryAsset(spec, 1)
    first, _ = asset.post(ts[:10], vals[:10])
    second, _ = asset.post(ts[10:], vals[10:])
    base = int(grid.grid_index(T0_MS / 1000.0, 60.0))
    assert (first.ends - base).tolist() == [6, 8]
    assert (second.ends - base).tolist() == [10, 12, 14, 16, 18, 20]


def test_a_resent_backfill_changes_nothing() -> None:
    spec = StreamSpec(60.0, 6, 2, 2, lateness_windows=1)
    ts = np.array([T0_MS + i * 60_000 for i in range(40)], dtype=np.int64)
    vals = np.ones((40, 1))
    asset = MemoryAsset(spec, 1)
    base = int(grid.grid_index(T0_MS / 1000.0, 60.0))
    live, _ = asset.post(ts[30:], vals[30:])  # live data first: 36 and 38 are whole
    assert (live.ends - base).tolist() == [36, 38]
    plan, _ = asset.post(ts[:30], vals[:30], backfill=True)
    assert (plan.ends - base).tolist() == list(range(6, 30, 2))
    again, new = asset.post(ts[:30], vals[:30], backfill=True)
    assert new == 0 and len(again.ends) == 0
    # Running into the stored history (those readings are duplicates) closes the seam.
    seam, new = asset.post(ts, vals, backfill=True)
    assert new == 0 and (seam.ends - base).tolist() == [30, 32, 34]
    assert len(asset.post(ts, vals, backfill=True)[0].ends) == 0


def test_a_longer_hold_set_later_never_forms_a_scored_window_again() -> None:
    ts = np.array([T0_MS + i * 60_000 for i in range(40)], dtype=np.int64)
    vals = np.ones((40, 1))
    asset = MemoryAsset(StreamSpec(60.0, 6, 2, 2), 1)
    first, _ = asset.post(ts[:20], vals[:20])
    asset.spec = StreamSpec(60.0, 6, 2, 2, hold_steps=8)
    later, _ = asset.post(ts[20:], vals[20:])
    assert len(first.ends) and len(later.ends)
    assert not set(first.ends.tolist()) & set(later.ends.tolist())
