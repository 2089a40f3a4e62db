"""The sample grid, gap policy and windowing in service/grid.py (the one definition everyone uses)."""

from __future__ import annotations

from datetime import datetime, timezone

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from service.grid import (
    Grid,
    TimestampError,
    align,
    cut_windows,
    fill_gaps,
    grid_index,
    lookback_points,
    parse_timestamp,
    window_ends,
    window_view,
)

# ---------------------------------------------------------------------------- timestamps


def test_parse_iso_with_offsets_and_epoch_seconds() -> None:
    t0 = datetime(2026, 9, 1, tzinfo=timezone.utc).timestamp()
    assert parse_timestamp("2026-09-01T00:00:00Z") == t0
    assert parse_timestamp("2026-09-01T02:00:00+02:00") == t0
    assert parse_timestamp("2026-08-31T19:00:00-05:00") == t0
    assert parse_timestamp(" 2026-09-01T00:00:00.250Z ") == t0 + 0.25
    assert parse_timestamp(t0) == t0
    assert parse_timestamp(str(int(t0))) == t0
    assert parse_timestamp(np.int64(int(t0))) == t0


def test_naive_refused_without_zone_and_placed_with_it() -> None:
    with pytest.raises(TimestampError, match="no UTC offset"):
        parse_timestamp("2026-07-01T12:00:00")
    # Central European Summer Time is UTC+2 in July, standard time UTC+1 in January (from memory).
    assert parse_timestamp("2026-07-01T12:00:00", "Europe/Berlin") == parse_timestamp("2026-07-01T10:00:00Z")
    assert parse_timestamp("2026-01-15T12:00:00", "Europe/Berlin") == parse_timestamp("2026-01-15T11:00:00Z")
    with pytest.raises(TimestampError, match="unknown time zone"):
        parse_timestamp("2026-07-01T12:00:00", "Mars/Olympus")


@pytest.mark.parametrize("bad", ["yesterday", "2026-13-01T00:00:00Z", "", None, True, float("nan"), "nan", "inf", [1]])
def test_unusable_timestamps_are_refused(bad: object) -> None:
    with pytest.raises(TimestampError):
        parse_timestamp(bad)


def test_grid_index_nearest_with_ties_to_the_later_point() -> None:
    assert grid_index(np.array([0.0, 29.9, 30.0, 89.9, 90.0, -30.0]), 60.0).tolist() == [0, 0, 1, 1, 2, 0]


# ---------------------------------------------------------------------------- align


def test_align_averages_readings_of_one_point_and_leaves_nan_where_none() -> None:
    ts = np.array([598.0, 603.0, 725.0, 900.0])  # points 10, 10, 12, 15
    vals = np.array([[1.0, np.nan], [3.0, 5.0], [7.0, 8.0], [9.0, 10.0]])
    g = align(ts, vals, 60.0)
    assert (g.start, g.end) == (10, 15)
    np.testing.assert_array_equal(g.values[0], [2.0, 5.0])  # NaN ignored in the mean
    assert np.isnan(g.values[1]).all() and np.isnan(g.values[3:5]).all()
    np.testing.assert_array_equal(g.values[2], [7.0, 8.0])
    bounded = align(ts, vals, 60.0, start=11, end=13)
    assert bounded.start == 11 and len(bounded.values) == 3
    np.testing.assert_array_equal(bounded.values[1], [7.0, 8.0])


def test_align_rejects_mismatched_shapes() -> None:
    with pytest.raises(ValueError, match="rows"):
        align(np.arange(3.0), np.zeros((4, 2)), 60.0)


# ---------------------------------------------------------------------------- fill_gaps

_series = arrays(
    np.float64,
    st.tuples(st.integers(1, 60), st.integers(1, 3)),
    elements=st.one_of(st.just(np.nan), st.floats(-100, 100, allow_nan=False, width=32)),
)


def _reference_fill(values: np.ndarray, max_fill: int) -> np.ndarray:
    """Plain loop statement of the policy: last observed value if at most max_fill points old."""
    out = values.copy()
    for c in range(values.shape[1]):
        last, last_i = np.nan, -(10**9)
        for i in range(len(values)):
            if np.isfinite(values[i, c]):
                last, last_i = values[i, c], i
            elif i - last_i <= max_fill:
                out[i, c] = last
    return out


@settings(max_examples=150, deadline=None)
@given(values=_series, max_fill=st.integers(0, 6))
def test_fill_gaps_matches_the_stated_policy(values: np.ndarray, max_fill: int) -> None:
    filled = fill_gaps(values, max_fill)
    np.testing.assert_array_equal(filled, _reference_fill(values, max_fill))
    observed = np.isfinite(values)
    np.testing.assert_array_equal(filled[observed], values[observed])  # never touches a reading
    assert not np.shares_memory(filled, values)


@settings(max_examples=150, deadline=None)
@given(values=_series, max_fill=st.integers(0, 6), cut=st.integers(1, 60))
def test_fill_gaps_is_causal(values: np.ndarray, max_fill: int, cut: int) -> None:
    cut = min(cut, len(values))
    np.testing.assert_array_equal(fill_gaps(values[:cut], max_fill), fill_gaps(values, max_fill)[:cut])


@settings(max_examples=100, deadline=None)
@given(values=_series, max_fill=st.integers(0, 5), window=st.integers(1, 8))
def test_a_lookback_fills_a_window_as_the_whole_history_does(values: np.ndarray, max_fill: int, window: int) -> None:
    need = lookback_points(window, max_fill)
    full = fill_gaps(values, max_fill)
    for end in range(need - 1, len(values)):
        part = fill_gaps(values[end - need + 1 : end + 1], max_fill)
        np.testing.assert_array_equal(part[-window:], full[end - window + 1 : end + 1])


# ---------------------------------------------------------------------------- windows


@settings(max_examples=150, deadline=None)
@given(
    values=_series,
    start=st.integers(-50, 5000),
    window=st.integers(1, 10),
    stride=st.integers(1, 7),
    max_fill=st.integers(0, 4),
)
def test_window_ends_are_exactly_the_complete_stride_aligned_windows(
    values: np.ndarray, start: int, window: int, stride: int, max_fill: int
) -> None:
    grid = Grid(start=start, values=fill_gaps(values, max_fill))
    ends = window_ends(grid, window, stride)
    assert ends.dtype == np.int64
    assert np.all(ends % stride == 0)
    assert np.all(np.diff(ends) > 0)
    # Brute force: every grid index whose window fits and holds no NaN, nothing else.
    expected = [
        e
        for e in range(grid.start, grid.end + 1)
        if e % stride == 0
        and e - window + 1 >= grid.start
        and np.isfinite(grid.values[e - window + 1 - grid.start : e + 1 - grid.start]).all()
    ]
    assert ends.tolist() == expected
    if len(ends):
        windows = cut_windows(grid, ends, window)
        assert windows.shape == (len(ends), window, values.shape[1]) and windows.dtype == np.float32
        assert not np.isnan(windows).any()


def test_no_window_spans_a_gap_longer_than_the_fill_limit() -> None:
    values = np.arange(40.0)[:, None]
    values[15:19] = np.nan  # a 4-point gap, fill limit 2: points 17, 18 stay NaN
    grid = Grid(start=0, values=fill_gaps(values, 2))
    assert np.isnan(grid.values[17:19]).all() and np.isfinite(grid.values[15:17]).all()
    ends = window_ends(grid, 5, 1)
    assert not np.any((ends - 4 <= 18) & (ends >= 17))
    assert 16 in ends and 23 in ends and 22 not in ends


def test_window_view_is_a_view_and_row_j_ends_at_j_plus_w_minus_1() -> None:
    values = np.arange(30.0).reshape(10, 3)
    view = window_view(values, 4)
    assert view.shape == (7, 4, 3)
    assert np.shares_memory(view, values)
    np.testing.assert_array_equal(view[2], values[2:6])
    assert not view.flags.writeable


def test_cut_windows_picks_windows_by_absolute_end_index() -> None:
    grid = Grid(start=100, values=np.arange(20.0).reshape(10, 2))
    out = cut_windows(grid, np.array([104, 109]), 3)
    np.testing.assert_array_equal(out[0], grid.values[2:5])
    np.testing.assert_array_equal(out[1], grid.values[7:10])
    assert not np.shares_memory(out, grid.values)
