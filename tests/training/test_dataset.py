"""Dataset preparation: gap policy, exclusion, time-ordered split, scaler, windows as views."""

from __future__ import annotations

import numpy as np
import pytest

from service.grid import align, fill_gaps
from training import demo_data
from training.dataset import PARTS, ArrayWindows, Prepared, _split_bounds, fit_scaler, prepare
from training.logs import DataError, Event, LogSet, from_arrays

PERIOD = 60.0
W, STRIDE, TRAIN_STRIDE, FILL = 30, 10, 3, 3


@pytest.fixture(scope="module")
def demo() -> demo_data.DemoData:
    return demo_data.generate(assets=3, days=4, seed=11)


@pytest.fixture(scope="module")
def logs(demo: demo_data.DemoData) -> LogSet:
    return from_arrays(demo.times_s, demo.values, demo.channels, demo.units)


@pytest.fixture(scope="module")
def events(demo: demo_data.DemoData) -> list[Event]:
    return [Event(e.asset, e.start_s, e.end_s, e.kind) for e in demo.events]


@pytest.fixture(scope="module")
def prepared(logs: LogSet, events: list[Event]) -> Prepared:
    return prepare(
        logs, period_s=PERIOD, max_fill_steps=FILL, window=W, stride=STRIDE, train_stride=TRAIN_STRIDE, exclude=events, margin_s=600.0
    )


def _asset_bounds(prep: Prepared, asset: str) -> list[tuple[int, int]]:
    g = prep.grids[asset]
    return _split_bounds(g.start, len(g.values), prep.fractions)


def test_windows_hold_no_nan_and_end_on_the_stride(prepared: Prepared) -> None:
    for part in PARTS:
        ws = prepared.parts[part]
        assert len(ws) > 0
        step = TRAIN_STRIDE if part == "train" else STRIDE
        assert np.all(ws.end_index % step == 0)
        x = ws.gather(np.arange(len(ws)))
        assert x.dtype == np.float32 and x.shape == (len(ws), W, len(prepared.channels))
        assert not np.isnan(x).any()


def test_gather_returns_raw_units_from_the_shared_grid(prepared: Prepared, logs: LogSet) -> None:
    ws = prepared.parts["validation"]
    idx = np.array([len(ws) - 1, 0, len(ws) // 2])
    x = ws.gather(idx)
    for k, i in enumerate(idx.tolist()):
        asset = ws.asset_of(i)
        g = prepared.grids[asset]
        pos = ws.end_index[i] - g.start
        np.testing.assert_array_equal(x[k], g.values[pos - W + 1 : pos + 1])
    # The grid is exactly align + fill_gaps of the readings (outside excluded periods), cast to float32.
    a = ws.assets[0]
    ref = fill_gaps(align(logs.assets[a].times_s, logs.assets[a].values, PERIOD).values, FILL).astype(np.float32)
    g = prepared.grids[a].values
    keep = ~np.isnan(g)
    np.testing.assert_array_equal(g[keep], ref[keep])


def test_window_views_share_memory_with_the_grid(prepared: Prepared) -> None:
    parts = [prepared.parts[p] for p in PARTS]
    for a_i, asset in enumerate(prepared.assets):
        grid = prepared.grids[asset].values
        for ws in parts:
            assert np.shares_memory(ws.views[a_i], grid)  # views, not copies
            assert ws.grids[a_i].values is grid  # one grid shared by all three parts
    held = sum(g.values.nbytes for g in prepared.grids.values())
    as_copies = sum(len(ws) for ws in parts) * W * len(prepared.channels) * 4
    assert as_copies > 4 * held  # W=30 at strides 3 and 10; the bench shows a 1 M-row case


def test_split_is_time_ordered_and_no_window_straddles(prepared: Prepared) -> None:
    for a_i, asset in enumerate(prepared.assets):
        bounds = _asset_bounds(prepared, asset)
        last_end = -np.inf
        for part, (lo, hi) in zip(PARTS, bounds):
            ws = prepared.parts[part]
            ends = ws.end_index[ws.asset_index == a_i]
            assert np.all(ends - W + 1 >= lo) and np.all(ends <= hi)
            if len(ends):
                assert ends.min() - W + 1 > last_end  # later parts start after earlier ones end
                last_end = ends.max()
        # fractions 0.70 / 0.15 / 0.15 of the asset's span, in order
        spans = [hi - lo + 1 for lo, hi in bounds]
        np.testing.assert_allclose(np.array(spans) / sum(spans), prepared.fractions, atol=2 / sum(spans))


def test_excluded_periods_and_margins_never_reach_any_part(prepared: Prepared, events: list[Event]) -> None:
    assert prepared.n_excluded_points > 0
    for part in PARTS:
        ws = prepared.parts[part]
        first_s = (ws.end_index - W + 1) * PERIOD
        last_s = ws.end_index * PERIOD
        assets = ws.asset_of(np.arange(len(ws)))
        for e in events:
            hit = (assets == e.asset) & (last_s >= e.start_s - prepared.margin_s) & (first_s < e.end_s + prepared.margin_s)
            assert not hit.any(), (part, e)


def test_exclusion_removes_windows_that_would_otherwise_exist(logs: LogSet, events: list[Event], prepared: Prepared) -> None:
    plain = prepare(logs, period_s=PERIOD, max_fill_steps=FILL, window=W, stride=STRIDE, train_stride=TRAIN_STRIDE)
    assert sum(plain.sizes().values()) > sum(prepared.sizes().values())
    assert plain.fingerprint != prepared.fingerprint
    assert plain.n_excluded_points == 0


def test_scaler_is_fitted_on_train_points_only(logs: LogSet, prepared: Prepared) -> None:
    # Reference: numpy's median and IQR over the train part's grid points (after fill and masking).
    train = np.concatenate(
        [prepared.grids[a].values[: b[0][1] - b[0][0] + 1] for a in prepared.assets for b in [_asset_bounds(prepared, a)]]
    ).astype(np.float64)
    q25, q50, q75 = np.nanpercentile(train, [25, 50, 75], axis=0)
    np.testing.assert_allclose(prepared.scaler_center, q50)
    assert np.all(prepared.scaler_scale >= (q75 - q25) / 1.349 - 1e-12) and np.all(prepared.scaler_scale > 0)

    # Wreck everything after the train part: the scaler must not move.
    times, values = {}, {}
    for a in logs.assets:
        t, v = logs.assets[a].times_s, logs.assets[a].values.copy()
        lo, hi = _asset_bounds(prepared, a)[0]
        v[np.floor(t / PERIOD + 0.5) > hi] *= 100.0
        times[a], values[a] = t, v
    wrecked = from_arrays(times, values, logs.channels, logs.units)
    other = prepare(wrecked, period_s=PERIOD, max_fill_steps=FILL, window=W, stride=STRIDE, train_stride=TRAIN_STRIDE, exclude=[], margin_s=0)
    base = prepare(logs, period_s=PERIOD, max_fill_steps=FILL, window=W, stride=STRIDE, train_stride=TRAIN_STRIDE, exclude=[], margin_s=0)
    np.testing.assert_array_equal(other.scaler_center, base.scaler_center)
    np.testing.assert_array_equal(other.scaler_scale, base.scaler_scale)


def test_scaler_floor_for_a_mostly_flat_channel_and_refusal_of_a_constant_one() -> None:
    flat = np.zeros((1000, 1))
    flat[::50] = 1.0  # IQR 0, still varies
    center, scale = fit_scaler([flat], ["current_a"])
    assert center[0] == 0.0 and scale[0] == pytest.approx(0.1 * np.std(flat))
    with pytest.raises(DataError, match="channel 'current_a' is constant"):
        fit_scaler([np.ones((10, 1))], ["current_a"])
    with pytest.raises(DataError, match="channel 'current_a' has no values in the training part"):
        fit_scaler([np.full((10, 1), np.nan)], ["current_a"])


def test_constant_train_part_is_refused_naming_the_channel() -> None:
    t = np.arange(600) * PERIOD
    v = np.stack([np.sin(np.arange(600) / 7.0), np.where(np.arange(600) < 500, 3.0, 4.0)], axis=1)
    logs = from_arrays({"p1": t}, {"p1": v}, ["flow_m3h", "current_a"], {"flow_m3h": "m3/h", "current_a": "A"})
    with pytest.raises(DataError, match=r"channel 'current_a' is constant \(3\) over the training part"):
        prepare(logs, period_s=PERIOD, max_fill_steps=2, window=20, stride=5)


def test_too_little_data_says_how_much_is_needed() -> None:
    t = np.arange(100) * PERIOD
    v = np.sin(np.arange(100) / 5.0)[:, None]
    logs = from_arrays({"p1": t}, {"p1": v}, ["flow_m3h"], {"flow_m3h": "m3/h"})
    with pytest.raises(DataError, match=r"the validation part has no complete window: each part needs at least 30 consecutive"):
        prepare(logs, period_s=PERIOD, max_fill_steps=2, window=30, stride=5)
    prepare(logs, period_s=PERIOD, max_fill_steps=2, window=10, stride=1)  # enough for a shorter window


def test_a_long_gap_breaks_windows_and_a_short_one_is_filled() -> None:
    n = 400
    t = np.arange(n) * PERIOD
    keep = np.ones(n, dtype=bool)
    keep[100:102] = False  # 2 missing points: filled (limit 3)
    keep[200:220] = False  # 20 missing points: breaks windows
    v = np.cos(np.arange(n) / 9.0)[:, None]
    logs = from_arrays({"p1": t[keep]}, {"p1": v[keep]}, ["flow_m3h"], {"flow_m3h": "m3/h"})
    prep = prepare(logs, period_s=PERIOD, max_fill_steps=3, window=10, stride=1, fractions=(0.8, 0.1, 0.1))
    ends = prep.parts["train"].end_index
    assert 105 in ends  # spans the short gap
    assert not np.any((ends - 9 <= 219) & (ends >= 203))  # 203..219 stay NaN after 3 fills


def test_span_sizes_and_fingerprint(prepared: Prepared, logs: LogSet, events: list[Event]) -> None:
    for part in PARTS:
        ws = prepared.parts[part]
        assert prepared.span_s(part) == len(ws) * ws.stride * PERIOD
    assert prepared.n_rows == logs.n_rows and prepared.n_grid_points >= prepared.n_readings - 10
    again = prepare(
        logs, period_s=PERIOD, max_fill_steps=FILL, window=W, stride=STRIDE, train_stride=TRAIN_STRIDE, exclude=events, margin_s=600.0
    )
    assert again.fingerprint == prepared.fingerprint
    other = prepare(logs, period_s=PERIOD, max_fill_steps=FILL, window=W + 1, stride=STRIDE, exclude=events, margin_s=600.0)
    assert other.fingerprint != prepared.fingerprint


def test_events_for_unknown_assets_are_reported(logs: LogSet) -> None:
    stray = Event("pump-99", 0.0, 60.0, "maintenance")
    prep = prepare(logs, period_s=PERIOD, max_fill_steps=FILL, window=W, stride=STRIDE, exclude=[stray])
    assert prep.unmatched_events == [stray]


@pytest.mark.parametrize(
    ("kwargs", "pattern"),
    [
        ({"window": 1}, "window must be at least 2"),
        ({"stride": 0}, "stride"),
        ({"fractions": (0.5, 0.5, 0.0)}, "fractions"),
        ({"fractions": (0.5, 0.3, 0.3)}, "fractions"),
        ({"max_fill_steps": -1}, "max_fill_steps"),
        ({"period_s": 0}, "period_s"),
    ],
)
def test_bad_options(logs: LogSet, kwargs: dict, pattern: str) -> None:  # type: ignore[type-arg]
    args = {"period_s": PERIOD, "max_fill_steps": FILL, "window": W, "stride": STRIDE} | kwargs
    with pytest.raises(DataError, match=pattern):
        prepare(logs, **args)


def test_array_windows_adapter() -> None:
    x = np.random.default_rng(0).normal(size=(5, 4, 3))
    aw = ArrayWindows(x, asset_ids=["a", "a", "b", "b", "b"], end_index=np.arange(10, 15))
    assert len(aw) == 5 and aw.window == 4
    got = aw.gather(np.array([4, 0]))
    assert type(got) is np.ndarray and got.dtype == np.float32
    np.testing.assert_array_equal(got, x[[4, 0]].astype(np.float32))
    assert aw.asset_of(np.array([0, 3])).tolist() == ["a", "b"]
    sub = aw.subset(np.array([1, 2]))
    assert sub.end_index.tolist() == [11, 12] and sub.asset_of(0) == "a" and len(sub) == 2
    with pytest.raises(ValueError, match="one per window"):
        ArrayWindows(x, asset_ids=["a"])
