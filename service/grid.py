"""Sample grid, gap policy and windowing: the one definition the trainer, the evaluator and
the service all use (numpy only).

Time is UTC epoch seconds everywhere. Grid point i stands for time i * period_s; a
reading belongs to its nearest grid point. A window of length W *ending* at index e
covers grid indexes e-W+1 .. e, and exists only where e % stride == 0, so every process
agrees on which windows there are.

Gap policy (stated once, here): a missing point is filled with the channel's last
observed value if that value is at most `max_fill_steps` points older (forward fill,
causal, so streaming and batch agree); a longer gap leaves NaN and no window may span it.
"""

from __future__ import annotations

import math

from dataclasses import dataclass
from datetime import datetime, timezone, tzinfo
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view


class TimestampError(ValueError):
    """A timestamp that cannot be used; the message says what would be accepted."""


def parse_timestamp(value: object, default_tz: str | tzinfo | None = None) -> float:
    """Epoch seconds (UTC) from an ISO-8601 string with offset, or a number of epoch seconds.

    A naive ISO string (no offset) is refused unless `default_tz` (an IANA name such as
    "Europe/Berlin", or a tzinfo) says which zone it was written in.
    """
    if isinstance(value, bool):
        raise TimestampError(f"{value!r} is not a timestamp: give ISO-8601 with offset or epoch seconds")
    if isinstance(value, (int, float, np.integer, np.floating)):
        ts = float(value)
        if not math.isfinite(ts):
            raise TimestampError(f"{value!r} is not a finite epoch-seconds value")
        return ts
    if not isinstance(value, str):
        raise TimestampError(f"{value!r} is not a timestamp: give ISO-8601 with offset or epoch seconds")
    text = value.strip()
    try:
        ts = float(text)
    except ValueError:
        pass
    else:
        if not math.isfinite(ts):  # float() also reads "nan" and "inf"
            raise TimestampError(f"{value!r} is not a finite epoch-seconds value")
        return ts
    try:
        dt = datetime.fromisoformat(text.replace("Z", "+00:00").replace("z", "+00:00"))
    except ValueError as e:
        raise TimestampError(
            f"{value!r} cannot be parsed: give ISO-8601 such as 2026-03-01T12:00:00Z or epoch seconds"
        ) from e
    if dt.tzinfo is None:
        if default_tz is None:
            raise TimestampError(
                f"{value!r} has no UTC offset: add one (e.g. +00:00 or Z) or state the time zone it was written in"
            )
        dt = dt.replace(tzinfo=resolve_tz(default_tz))
    return dt.astimezone(timezone.utc).timestamp()


def iso_ms(ts_ms: int) -> str:
    """Epoch milliseconds as ISO-8601 UTC with Z (`2026-10-13T09:00:00Z`); milliseconds only when there are any."""
    ts_ms = int(ts_ms)
    text = datetime.fromtimestamp(ts_ms // 1000, tz=timezone.utc).strftime("%Y-%m-%dT%H:%M:%S")
    return text + (f".{ts_ms % 1000:03d}Z" if ts_ms % 1000 else "Z")


def iso_s(ts_s: float) -> str:
    """Epoch seconds as `iso_ms` writes them (rounded to the millisecond)."""
    return iso_ms(int(round(ts_s * 1000)))


def resolve_tz(tz: str | tzinfo) -> tzinfo:
    if isinstance(tz, tzinfo):
        return tz
    try:
        return ZoneInfo(tz)
    except (ZoneInfoNotFoundError, ValueError) as e:
        raise TimestampError(f"unknown time zone {tz!r}: give an IANA name such as 'UTC' or 'Europe/Berlin'") from e


def grid_index(ts_s: np.ndarray | float, period_s: float) -> np.ndarray:
    """Nearest grid index of each epoch-seconds time (ties go to the later point)."""
    return np.floor(np.asarray(ts_s, dtype=np.float64) / period_s + 0.5).astype(np.int64)


@dataclass(frozen=True)
class Grid:
    """Values on consecutive grid points start .. start+len-1; NaN where nothing was observed."""

    start: int
    values: np.ndarray  # (T, C) float64

    @property
    def end(self) -> int:
        """Last grid index held (inclusive)."""
        return self.start + len(self.values) - 1


def align(
    ts_s: np.ndarray,
    values: np.ndarray,
    period_s: float,
    start: int | None = None,
    end: int | None = None,
) -> Grid:
    """Put readings on the grid: the mean of the readings nearest each point, NaN where none.

    `values` is (N, C) with NaN for a missing channel value. `start`/`end` (inclusive grid
    indexes) bound the result; readings outside are dropped. Memory is O(T x C).
    """
    ts_s = np.asarray(ts_s, dtype=np.float64)
    values = np.asarray(values, dtype=np.float64)
    if values.ndim != 2 or len(values) != len(ts_s):
        raise ValueError(f"values must be (N, C) with N={len(ts_s)} rows, got shape {values.shape}")
    idx = grid_index(ts_s, period_s)
    if start is None:
        start = int(idx.min()) if len(idx) else 0
    if end is None:
        end = int(idx.max()) if len(idx) else start - 1
    n_points = max(end - start + 1, 0)
    keep = (idx >= start) & (idx <= end)
    pos = idx[keep] - start
    vals = values[keep]
    if len(pos) < 2 or bool(np.all(pos[1:] > pos[:-1])):
        # One reading per point, in time order (the usual case): the mean is the reading
        # itself, so place the rows directly (np.add.at costs microseconds per element).
        out = np.full((n_points, values.shape[1]), np.nan)
        out[pos] = np.where(np.isfinite(vals), vals, np.nan)
        return Grid(start=start, values=out)
    observed = np.isfinite(vals)
    sums = np.zeros((n_points, values.shape[1]))
    counts = np.zeros((n_points, values.shape[1]))
    np.add.at(sums, pos, np.where(observed, vals, 0.0))
    np.add.at(counts, pos, observed)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = sums / counts
    out[counts == 0] = np.nan
    return Grid(start=start, values=out)


def fill_gaps(values: np.ndarray, max_fill_steps: int) -> np.ndarray:
    """Forward-fill each channel's runs of NaN no older than `max_fill_steps` points; a copy.

    The value at point i depends only on points i-max_fill_steps .. i, which is what lets the
    service fill a window from a short look-back and agree with the trainer.
    """
    values = np.asarray(values, dtype=np.float64)
    out = values.copy()
    if max_fill_steps <= 0 or len(values) == 0:
        return out
    t = np.arange(len(values))[:, None]
    observed = np.isfinite(values)
    last_seen = np.where(observed, t, -1)
    np.maximum.accumulate(last_seen, axis=0, out=last_seen)
    age = t - last_seen
    fill = (~observed) & (last_seen >= 0) & (age <= max_fill_steps)
    rows, cols = np.nonzero(fill)
    out[rows, cols] = values[last_seen[rows, cols], cols]
    return out


def lookback_points(window: int, max_fill_steps: int) -> int:
    """Grid points needed before and including a window's end to fill and cut it."""
    return window + max(max_fill_steps, 0)


def window_ends(grid: Grid, window: int, stride: int) -> np.ndarray:
    """Absolute grid indexes e (e % stride == 0) whose window lies inside `grid` with no NaN.

    Call on filled values: a NaN left after `fill_gaps` marks a long gap, which breaks windows.
    """
    t_len = len(grid.values)
    if t_len < window:
        return np.empty(0, dtype=np.int64)
    bad = ~np.all(np.isfinite(grid.values), axis=1)
    bad_before = np.concatenate([[0], np.cumsum(bad)])
    first_end = grid.start + window - 1
    e0 = first_end + (-first_end) % stride
    ends = np.arange(e0, grid.end + 1, stride, dtype=np.int64)
    hi = ends - grid.start + 1
    lo = hi - window
    return ends[(bad_before[hi] - bad_before[lo]) == 0]


def window_view(values: np.ndarray, window: int) -> np.ndarray:
    """All windows of `values` (T, C) as a read-only view of shape (T-W+1, W, C); no copy.

    Row j is the window ending at position j + W - 1.
    """
    return sliding_window_view(values, window, axis=0).transpose(0, 2, 1)


def cut_windows(grid: Grid, ends: np.ndarray, window: int) -> np.ndarray:
    """The windows ending at absolute indexes `ends`, as a float32 (B, W, C) array (a copy)."""
    view = window_view(grid.values, window)
    return np.ascontiguousarray(view[np.asarray(ends) - grid.start - window + 1], dtype=np.float32)
