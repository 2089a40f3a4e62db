"""From a LogSet to train / validation / calibration windows, as views over one grid per asset.

Steps, per asset: align the readings to the sample grid and fill short gaps with the one
policy in `service.grid` (so training sees exactly what the service will see); then blank
(NaN) every point inside a known fault or maintenance period widened by `margin_s` on
both sides, so no window can span one (masking comes after filling, so a fill never
carries a fault's value out of the period either); then split the asset's grid span by
time into train / validation / calibration, and keep a window for a part only when it lies
entirely inside that part.

Windows are never copied up front: each part holds (asset, end index) pairs, and
`WindowSet.gather` cuts a batch from `service.grid.window_view` of the shared per-asset
grid. Memory therefore grows with the number of readings, not readings x window.
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace

import numpy as np

from service.grid import Grid, align, fill_gaps, window_ends, window_view
from training.config import DataConfig
from training.logs import DataError, Event, LogSet

PARTS: tuple[str, ...] = ("train", "validation", "calibration")
DEFAULT_MARGIN_S = 3600.0


class WindowSet:
    """Windows of one part: `len(ws)`, `ws.gather(idx)` -> float32 (B, W, C) in raw units."""

    def __init__(
        self,
        grids: Sequence[Grid],
        assets: Sequence[str],
        asset_index: np.ndarray,
        end_index: np.ndarray,
        window: int,
        period_s: float,
        stride: int,
    ) -> None:
        self.grids = tuple(grids)  # filled and masked, float32, shared by every part
        self.assets = tuple(assets)
        self.asset_index = np.asarray(asset_index, dtype=np.int32)  # (N,) into `assets`
        self.end_index = np.asarray(end_index, dtype=np.int64)  # (N,) absolute grid indexes
        self.window = int(window)
        self.period_s = float(period_s)
        self.stride = int(stride)
        self.views = tuple(window_view(g.values, self.window) for g in self.grids)  # (T-W+1, W, C) views

    def __len__(self) -> int:
        return len(self.end_index)

    @property
    def n_channels(self) -> int:
        return int(self.grids[0].values.shape[1]) if self.grids else 0

    @property
    def end_s(self) -> np.ndarray:
        """Window end times, epoch seconds UTC."""
        return self.end_index.astype(np.float64) * self.period_s

    def asset_of(self, idx: np.ndarray | int) -> np.ndarray:
        """Asset ids of windows `idx`."""
        return np.asarray(self.assets, dtype=object)[self.asset_index[idx]]

    def gather(self, idx: np.ndarray | Sequence[int]) -> np.ndarray:
        """Windows `idx` as a new float32 (B, W, C) array, raw engineering units."""
        idx = np.asarray(idx, dtype=np.int64)
        out = np.empty((len(idx), self.window, self.n_channels), dtype=np.float32)  # (B, W, C)
        which = self.asset_index[idx]
        for a in np.unique(which).tolist():
            sel = np.flatnonzero(which == a)
            pos = self.end_index[idx[sel]] - self.grids[a].start - self.window + 1
            out[sel] = self.views[a][pos]
        return out


class ArrayWindows(np.ndarray):
    """Windows already in memory, (N, W, C), with the WindowSet interface (gather, asset_of, end_index)."""

    asset_ids: np.ndarray
    end_index: np.ndarray

    def __new__(
        cls,
        windows: np.ndarray,
        asset_ids: Sequence[str] | np.ndarray | None = None,
        end_index: np.ndarray | None = None,
    ) -> ArrayWindows:
        arr = np.asarray(windows, dtype=np.float32)
        if arr.ndim != 3:
            raise ValueError(f"windows must be (N, W, C), got shape {arr.shape}")
        obj = arr.view(cls)
        n = len(arr)
        obj.asset_ids = np.asarray(asset_ids if asset_ids is not None else [""] * n, dtype=object)
        obj.end_index = np.asarray(end_index if end_index is not None else np.arange(n), dtype=np.int64)
        if len(obj.asset_ids) != n or len(obj.end_index) != n:
            raise ValueError(f"asset_ids and end_index need {n} entries, one per window")
        return obj

    def __array_finalize__(self, obj: object) -> None:
        self.asset_ids = getattr(obj, "asset_ids", np.empty(0, dtype=object))
        self.end_index = getattr(obj, "end_index", np.empty(0, dtype=np.int64))

    @property
    def window(self) -> int:
        return int(self.shape[1])

    def gather(self, idx: np.ndarray | Sequence[int]) -> np.ndarray:
        return np.asarray(self)[np.asarray(idx, dtype=np.int64)]

    def asset_of(self, idx: np.ndarray | int) -> np.ndarray:
        return self.asset_ids[idx]

    def subset(self, idx: np.ndarray | Sequence[int]) -> ArrayWindows:
        """Windows `idx` with their asset ids and end indexes (plain slicing keeps the full metadata)."""
        idx = np.asarray(idx, dtype=np.int64)
        return ArrayWindows(np.asarray(self)[idx], self.asset_ids[idx], self.end_index[idx])


@dataclass
class Prepared:
    """The three parts plus what the manifest needs to know about the data."""

    parts: dict[str, WindowSet]
    channels: tuple[str, ...]
    units: dict[str, str]
    assets: tuple[str, ...]
    grids: dict[str, Grid]  # per asset: filled, masked, float32
    scaler_center: np.ndarray  # (C,) float64, raw units
    scaler_scale: np.ndarray  # (C,) float64, raw units, > 0
    period_s: float
    window: int
    stride: int
    train_stride: int
    max_fill_steps: int
    margin_s: float
    fractions: tuple[float, float, float]
    fingerprint: str
    source_sha256: str
    n_rows: int  # data rows in the source
    n_readings: int  # readings after pivoting (one per asset and time)
    n_grid_points: int  # summed over assets
    n_excluded_points: int  # grid points blanked by --exclude periods and their margins
    unmatched_events: list[Event] = field(default_factory=list)  # events naming assets not in the logs

    def span_s(self, part: str) -> float:
        """Time the part's windows stand for, summed over assets: windows x stride x period_s.

        That is the time between consecutive scored window ends, i.e. the observation time
        over which a replay of the part's scores counts alerts (for false-alarm rates).
        """
        ws = self.parts[part]
        return float(len(ws) * ws.stride * self.period_s)

    def sizes(self) -> dict[str, int]:
        return {name: len(ws) for name, ws in self.parts.items()}


def _check_options(
    period_s: float, max_fill_steps: int, window: int, stride: int, train_stride: int, margin_s: float, fractions: Sequence[float]
) -> tuple[float, float, float]:
    if not period_s > 0:
        raise DataError(f"period_s must be positive, got {period_s}")
    if window < 2:
        raise DataError(f"window must be at least 2 points, got {window}")
    if stride < 1 or train_stride < 1:
        raise DataError(f"stride and train_stride must be at least 1, got {stride} and {train_stride}")
    if max_fill_steps < 0:
        raise DataError(f"max_fill_steps must be 0 or more, got {max_fill_steps}")
    if margin_s < 0:
        raise DataError(f"margin_s must be 0 or more, got {margin_s}")
    fr = tuple(float(f) for f in fractions)
    if len(fr) != 3 or min(fr) <= 0 or abs(sum(fr) - 1.0) > 1e-9:
        raise DataError(f"fractions must be three positive numbers summing to 1 (train, validation, calibration), got {fractions}")
    return fr  # type: ignore[return-value]


def _mask_events(grid_values: np.ndarray, start: int, events: Sequence[Event], period_s: float, margin_s: float) -> int:
    """Blank grid points whose time lies in [start - margin, end + margin); returns how many."""
    n = 0
    for e in events:
        lo = int(np.ceil((e.start_s - margin_s) / period_s)) - start
        hi = int(np.ceil((e.end_s + margin_s) / period_s)) - start  # exclusive
        lo, hi = max(lo, 0), min(hi, len(grid_values))
        if hi > lo:
            n += hi - lo - int(np.all(np.isnan(grid_values[lo:hi]), axis=1).sum())
            grid_values[lo:hi] = np.nan
    return n


def _split_bounds(start: int, n_points: int, fractions: tuple[float, float, float]) -> list[tuple[int, int]]:
    """Inclusive grid-index ranges of the three parts, in time order."""
    b1 = start + int(np.floor(fractions[0] * n_points))
    b2 = start + int(np.floor((fractions[0] + fractions[1]) * n_points))
    return [(start, b1 - 1), (b1, b2 - 1), (b2, start + n_points - 1)]


def fit_scaler(train_values: Sequence[np.ndarray], channels: Sequence[str]) -> tuple[np.ndarray, np.ndarray]:
    """Robust per-channel centre and scale from training points only (NaN ignored).

    centre = median; scale = max(IQR / 1.349, 0.1 x standard deviation, 1e-3 x mean |x|).
    IQR / 1.349 equals the standard deviation for Gaussian data but ignores outliers; the
    floors keep a mostly-flat channel (IQR 0, e.g. a pump that rarely stops) from getting a
    tiny scale that would blow up its residuals. A channel with no training values or one
    value only raises DataError naming it.
    """
    stacked = np.concatenate([np.asarray(v, dtype=np.float64) for v in train_values], axis=0)
    center = np.empty(len(channels))
    scale = np.empty(len(channels))
    for j, ch in enumerate(channels):
        col = stacked[:, j]
        col = col[np.isfinite(col)]
        if len(col) == 0:
            raise DataError(f"channel {ch!r} has no values in the training part (after excluding events): cannot scale it")
        lo, med, hi = np.percentile(col, [25.0, 50.0, 75.0])
        if col.min() == col.max():
            raise DataError(
                f"channel {ch!r} is constant ({col[0]:g}) over the training part: it carries no information "
                f"and cannot be scaled; drop it or train on a period where it varies"
            )
        center[j] = med
        scale[j] = max((hi - lo) / 1.349, 0.1 * float(np.std(col)), 1e-3 * float(np.mean(np.abs(col))))
    return center, scale


def prepare(
    logs: LogSet,
    *,
    period_s: float,
    max_fill_steps: int,
    window: int,
    stride: int,
    train_stride: int | None = None,
    exclude: Sequence[Event] = (),
    margin_s: float = DEFAULT_MARGIN_S,
    fractions: Sequence[float] = (0.70, 0.15, 0.15),
) -> Prepared:
    """Align, fill, mask, split and window `logs`; fit the scaler on training points only.

    `stride` is the serving stride (validation and calibration windows use it, so their
    score sequences replay like the service's); `train_stride` (default `stride`) may be
    denser. `exclude`: known fault/maintenance periods, widened by `margin_s` each side.
    """
    train_stride = stride if train_stride is None else int(train_stride)
    fr = _check_options(period_s, max_fill_steps, window, stride, train_stride, margin_s, fractions)
    known = set(logs.assets)
    by_asset: dict[str, list[Event]] = {a: [] for a in logs.assets}
    unmatched: list[Event] = []
    for e in exclude:
        (by_asset[e.asset] if e.asset in known else unmatched).append(e)

    names = tuple(logs.assets)
    grids: dict[str, Grid] = {}
    ends: dict[str, list[np.ndarray]] = {p: [] for p in PARTS}
    owners: dict[str, list[np.ndarray]] = {p: [] for p in PARTS}
    train_points: list[np.ndarray] = []
    part_points = dict.fromkeys(PARTS, 0)
    n_grid = n_excluded = 0
    for a_i, name in enumerate(names):
        log = logs.assets[name]
        aligned = align(log.times_s, log.values, period_s)
        start = aligned.start
        filled = fill_gaps(aligned.values, max_fill_steps)
        del aligned
        n_excluded += _mask_events(filled, start, by_asset[name], period_s, margin_s)
        grid = Grid(start=start, values=filled.astype(np.float32))
        del filled
        grids[name] = grid
        n_grid += len(grid.values)
        for part, (lo, hi), step in zip(PARTS, _split_bounds(start, len(grid.values), fr), (train_stride, stride, stride)):
            if hi < lo:
                continue
            part_points[part] += hi - lo + 1
            sub = Grid(start=lo, values=grid.values[lo - start : hi - start + 1])
            e = window_ends(sub, window, step)
            ends[part].append(e)
            owners[part].append(np.full(len(e), a_i, dtype=np.int32))
            if part == "train":
                train_points.append(sub.values)

    for part in PARTS:
        total = sum(len(e) for e in ends[part])
        if total == 0:
            hours = window * period_s / 3600.0
            raise DataError(
                f"the {part} part has no complete window: each part needs at least {window} consecutive usable "
                f"grid points ({hours:g} h at {period_s:g} s) with no gap longer than {max_fill_steps} points and "
                f"no excluded period; it has {part_points[part]} points over {len(names)} asset(s). "
                f"Give more data, a shorter window, or different fractions (now {', '.join(f'{f:g}' for f in fr)})"
            )
    center, scale = fit_scaler(train_points, logs.channels)
    grid_list = [grids[n] for n in names]
    parts = {
        part: WindowSet(grid_list, names, np.concatenate(owners[part]), np.concatenate(ends[part]), window, period_s, step)
        for part, step in zip(PARTS, (train_stride, stride, stride))
    }
    options = {
        "period_s": period_s,
        "max_fill_steps": max_fill_steps,
        "window": window,
        "stride": stride,
        "train_stride": train_stride,
        "margin_s": margin_s,
        "fractions": fr,
        "channels": list(logs.channels),
        "exclude": sorted((e.asset, e.start_s, e.end_s, e.kind) for e in exclude),
    }
    fingerprint = hashlib.sha256((logs.sha256 + json.dumps(options, sort_keys=True)).encode()).hexdigest()
    return Prepared(
        parts=parts,
        channels=logs.channels,
        units=dict(logs.units),
        assets=names,
        grids=grids,
        scaler_center=center,
        scaler_scale=scale,
        period_s=float(period_s),
        window=int(window),
        stride=int(stride),
        train_stride=int(train_stride),
        max_fill_steps=int(max_fill_steps),
        margin_s=float(margin_s),
        fractions=fr,
        fingerprint=fingerprint,
        source_sha256=logs.sha256,
        n_rows=logs.n_rows,
        n_readings=logs.n_readings,
        n_grid_points=n_grid,
        n_excluded_points=n_excluded,
        unmatched_events=unmatched,
    )


# ------------------------------------------------------------------ grid and window defaults from the data

# Bounds on a window derived from `window_s`: fewer than 24 points give the LSTM too little
# shape to learn (a 10-minute log's hour would be 6); more than 240 (4x the bundled model's
# 60) make training and scoring slow (the LSTM's cost grows with the steps) for little gain.
WINDOW_STEPS_MIN = 24
WINDOW_STEPS_MAX = 240
# Assets whose median sampling intervals differ by more than this factor cannot share one
# grid chosen from the data: the coarse ones would be filled, or the fine ones averaged.
PERIOD_SPREAD_MAX = 1.5


def median_interval_s(times_s: np.ndarray) -> float | None:
    """Median time between consecutive readings (seconds), or None with fewer than two readings."""
    t = np.asarray(times_s, dtype=np.float64)
    if len(t) < 2:
        return None
    return float(np.median(np.diff(t)))


def nice_period(period_s: float) -> float:
    """A jittery median such as 4.98 s read as 5 s: whole seconds within 2 %, else 3 significant digits."""
    whole = round(period_s)
    if whole >= 1 and abs(period_s - whole) <= 0.02 * period_s:
        return float(whole)
    return float(f"{period_s:.3g}")


def data_period_s(logs: LogSet) -> float:
    """The grid period the data ask for: the assets' median sampling interval.

    Raises DataError when no asset has two readings, or when the assets' own medians
    differ by more than PERIOD_SPREAD_MAX (naming the fastest and slowest asset).
    """
    per_asset = {name: median_interval_s(a.times_s) for name, a in logs.assets.items()}
    known = {k: v for k, v in per_asset.items() if v is not None and v > 0}
    if not known:
        raise DataError(
            f"{logs.source}: no asset has two readings, so the sampling interval cannot be read from the data; "
            "give --period-s SECONDS"
        )
    fast = min(known, key=known.__getitem__)
    slow = max(known, key=known.__getitem__)
    if known[slow] > PERIOD_SPREAD_MAX * known[fast]:
        raise DataError(
            f"{logs.source}: the assets log at different intervals (asset {fast} every {known[fast]:g} s, "
            f"asset {slow} every {known[slow]:g} s, medians), so one grid period cannot be chosen from the data; "
            f"give --period-s SECONDS (e.g. --period-s {nice_period(known[slow]):g} to put every asset on the "
            "coarsest interval), or train the groups separately"
        )
    return nice_period(float(np.median(list(known.values()))))


def _span(seconds: float) -> str:
    if seconds >= 3600 and seconds % 360 == 0:
        return f"{seconds / 3600:g} h"
    if seconds >= 60:
        return f"{seconds / 60:.3g} min"
    return f"{seconds:.3g} s"


def resolve_data_config(logs: LogSet, data: DataConfig, log: Callable[[str], None] | None = None) -> DataConfig:
    """Fill the unset grid settings of `data` from the logs; say what was chosen through `log`.

    period: the data's median sampling interval (data_period_s) unless given. window: the
    given steps, else window_s / period rounded and clamped to [WINDOW_STEPS_MIN,
    WINDOW_STEPS_MAX] (a clamp is reported). Strides: the given steps, else their fraction
    of the window (at least 1). Gap fill: the given steps, else max_fill_s / period (at
    least 1 point). A config already resolved comes back unchanged (nothing logged).
    """
    if data.resolved:
        return data
    say = log or (lambda _m: None)
    notes: list[str] = []
    if data.period_s is None:
        period = data_period_s(logs)
        notes.append(f"grid period {period:g} s: the data's median sampling interval (override with --period-s)")
    else:
        period = float(data.period_s)
    if not period > 0 or not math.isfinite(period):
        raise DataError(f"the grid period must be a positive number of seconds, got {period}")
    window = data.window
    if window is None:
        wanted = max(int(round(data.window_s / period)), 2)
        window = min(max(wanted, WINDOW_STEPS_MIN), WINDOW_STEPS_MAX)
        if window != wanted:
            bound = "at least" if window > wanted else "at most"
            notes.append(
                f"window: {_span(data.window_s)} at {period:g} s would be {wanted} grid points; clamped to {window} "
                f"({_span(window * period)}), since a window takes {bound} {window} points "
                f"({WINDOW_STEPS_MIN}-{WINDOW_STEPS_MAX}); give --window POINTS or --window-s, "
                + ("or a coarser --period-s for a longer context" if window < wanted else "or a finer --period-s")
            )
    stride = data.stride if data.stride is not None else max(int(round(window * data.stride_frac)), 1)
    train_stride = data.train_stride if data.train_stride is not None else max(int(round(window * data.train_stride_frac)), 1)
    fill = data.max_fill_steps if data.max_fill_steps is not None else max(int(data.max_fill_s // period), 1)
    notes.append(
        f"window {window} points ({_span(window * period)}), stride {stride} ({_span(stride * period)}), "
        f"training stride {train_stride}, gaps filled up to {fill} points ({_span(fill * period)})"
    )
    for note in notes:
        say(note)
    return replace(data, period_s=period, window=int(window), stride=int(stride), train_stride=int(train_stride), max_fill_steps=int(fill))


def prepare_with(logs: LogSet, data: DataConfig, exclude: Sequence[Event] = ()) -> Prepared:
    """`prepare` with the grid, window and split settings of a DataConfig (trainer, evaluator, benches)."""
    data = resolve_data_config(logs, data)
    return prepare(
        logs,
        period_s=data.period_s,
        max_fill_steps=data.max_fill_steps,
        window=data.window,
        stride=data.stride,
        train_stride=data.train_stride,
        exclude=list(exclude),
        margin_s=data.margin_s,
        fractions=data.fractions,
    )
