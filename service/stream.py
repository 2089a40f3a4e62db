"""The streaming core: what one batch of an asset's readings does, as pure functions.

Given a view of the asset's stored rows (readings, scored windows, gap records), its marks
(newest reading, last window the alert rule saw) and a new batch, `plan_batch` says which
windows are now due, which of them can be scored (and cuts them), which are gap windows,
and which scored windows the alert rule sees; `rule_steps` runs the rule over their scores.
The live service (service/ingest.py), `kilter evaluate` (through `MemoryAsset` and
`replay_series`) and the threshold preview (`rule_steps` over stored scores) call these
same functions, so a window, a score and an alert mean the same thing everywhere.

The rule that makes windows independent of batching (a batch may be cut anywhere, the
stored outcome is the same as posting its readings one at a time in arrival order):

* A window ends on grid index e with e % stride == 0 (service/grid.py). It is *due* once
  the asset's newest reading is at index >= e + hold_steps; it is formed at that moment
  from every reading stored then, filled by the one gap policy, and scored once (or
  recorded as a gap window). `hold_steps` (default 0) is how far out of order readings may
  arrive and still count in every window they belong to.
* A reading is *late* when its index is <= (the newest reading before it, in arrival
  order) - hold_steps: windows it belongs to may already be formed. Late readings are
  stored and counted; they never change a scored window. A late reading can still complete
  a window that is due but not scored (a gap window, or an outage) ending within
  `lateness_windows` window periods of the newest reading before it: that window is formed
  then, from the readings stored at that moment. Because lateness is judged per reading
  against the readings that arrived before it (never against the batch's end), a batch is
  cut into runs at each late reading and each run is planned in turn, which is exactly the
  one-at-a-time outcome.
* Gap windows: a formed window that cannot be filled, holds at least one reading and lies
  after the asset's first reading is recorded once; if it is scored later its record goes.
  Windows holding no reading (outage, warm-up) are neither scored nor recorded.
* The alert rule sees a scored window only when it ends after every window the rule saw
  before (in formation order); a late window filling a hole behind that point is stored
  with `rule_saw` false and never moves the rule, and the rule's state is rebuilt only from
  windows it saw, so a later batch sees the same state whatever came before it.
* Backfill (`backfill=True`): the batch forms every window ending from its oldest to
  `hold_steps` before its newest timestamp that is not scored yet, from every reading
  stored once the batch is; stored newer readings do not make its windows due early, so
  history posted in time order, in batches of any size, forms each window from all of its
  readings. There is no lateness limit, and windows already scored are skipped, which
  makes resending a backfill change nothing. Readings of the batch already stored
  (duplicates) count in its span, so a backfill that runs one window span into the stored
  history also forms the windows across the seam between the two. Alerts come from the
  backfilled windows the rule sees (newer than every window it saw: a new asset's history,
  or history after its newest window); older backfilled windows are stored but open none.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np

from service import grid
from service.alerting import AlertRule, RuleState, Transition, steps
from service.errors import Conflict
from service.manifest import Manifest

_NONE = -(2**62)  # "no reading yet" as a grid index, far below any real one


@dataclass(frozen=True)
class StreamSpec:
    """The model's grid and windows plus the service's timing settings."""

    period_s: float
    window: int
    stride: int
    max_fill_steps: int
    hold_steps: int = 0
    lateness_windows: int | None = None  # None: no limit (backfill, evaluate)

    @classmethod
    def of(cls, manifest: Manifest, *, hold_steps: int = 0, lateness_windows: int | None = None) -> StreamSpec:
        return cls(manifest.sample_period_s, manifest.window, manifest.stride, manifest.gap_policy.max_fill_steps,
                   hold_steps, lateness_windows)

    @property
    def reach(self) -> int:
        """Grid points before a window's end that can change it (its length and the fill look-back)."""
        return self.window - 1 + max(self.max_fill_steps, 0)

    def end_ms(self, ends: np.ndarray) -> np.ndarray:
        return np.round(np.asarray(ends, dtype=np.int64) * self.period_s * 1000).astype(np.int64)


class StoredView(Protocol):
    """What the core reads of an asset's stored rows (one model version's windows)."""

    def readings(self, lo_ms: int, hi_ms: int) -> tuple[np.ndarray, np.ndarray]:
        """(ts_ms int64, values float64 (N, C) with NaN for null) with lo_ms <= ts <= hi_ms, in time order."""
        ...

    def scored(self, lo: int, hi: int) -> set[int]:
        """Window ends lo..hi already scored."""
        ...

    def gaps(self, lo: int, hi: int) -> set[int]:
        """Window ends lo..hi with a gap record."""
        ...

    def first_ms(self) -> int | None:
        """The asset's oldest stored reading."""
        ...


@dataclass(frozen=True)
class Marks:
    newest_ms: int | None  # the asset's newest stored reading
    rule_last_idx: int | None  # the last window end the alert rule saw


def new_readings(
    asset_id: str, ts_ms: np.ndarray, dicts: Sequence[dict[str, Any]], stored: dict[int, dict[str, Any]]
) -> tuple[list[int], int]:
    """Positions of the batch's new readings (first occurrence, arrival order) and the count
    of duplicates; Conflict naming the reading when a stored timestamp comes with other values."""
    new_pos: list[int] = []
    taken: set[int] = set()
    duplicates = 0
    for i, (t, v) in enumerate(zip(ts_ms.tolist(), dicts)):
        if t in stored:
            if stored[t] != v:
                iso = grid.iso_ms(t)
                raise Conflict(
                    f"body.readings[{i}].ts: {iso} is already stored for {asset_id!r} with different values; "
                    "a reading cannot be changed once stored",
                    field=f"body.readings[{i}].ts",
                    details={"ts": iso, "stored": stored[t]},
                )
            duplicates += 1
        elif t in taken:
            duplicates += 1  # the same reading twice in this batch
        else:
            taken.add(t)
            new_pos.append(i)
    return new_pos, duplicates


@dataclass
class Segment:
    """Scoreable windows formed together: their ends and the filled grid they are cut from."""

    filled: grid.Grid
    ends: np.ndarray  # int64, ascending


@dataclass
class BatchPlan:
    """What a batch of new readings does to its asset's windows (nothing stored yet)."""

    segments: list[Segment] = field(default_factory=list)
    ends: np.ndarray = field(default_factory=lambda: np.empty(0, np.int64))  # every window to score, formation order
    rule_saw: np.ndarray = field(default_factory=lambda: np.empty(0, bool))  # per `ends`: the alert rule sees it
    gap_new: np.ndarray = field(default_factory=lambda: np.empty(0, np.int64))  # gap records to add
    refilled: np.ndarray = field(default_factory=lambda: np.empty(0, np.int64))  # gap records to remove
    late: int = 0  # readings past the lateness limit: stored, in no window formed from now on
    newest_idx: int | None = None

    def windows(self, window: int, select: np.ndarray | None = None) -> np.ndarray:
        """float32 (B, W, C) windows of `ends` (or of those where `select` is true), in `ends` order."""
        parts = []
        at = 0
        for seg in self.segments:
            n = len(seg.ends)
            ends = seg.ends if select is None else seg.ends[select[at : at + n]]
            at += n
            if len(ends):
                parts.append(grid.cut_windows(seg.filled, ends, window))
        if not parts:
            c = self.segments[0].filled.values.shape[1] if self.segments else 0
            return np.empty((0, window, c), np.float32)
        return np.concatenate(parts) if len(parts) > 1 else parts[0]


def _ends_between(lo: int, hi: int, stride: int) -> np.ndarray:
    """Window ends (multiples of stride) in [lo, hi]."""
    if hi < lo:
        return np.empty(0, np.int64)
    first = lo + (-lo) % stride
    return np.arange(first, hi + 1, stride, dtype=np.int64)


def _runs(idx: np.ndarray, prev: int, hold: int) -> tuple[np.ndarray, np.ndarray]:
    """Per reading: the newest index before it (arrival order, `prev` before the batch) and
    whether it is late."""
    before = np.empty(len(idx), np.int64)
    before[0] = prev
    if len(idx) > 1:
        before[1:] = np.maximum(np.maximum.accumulate(idx)[:-1], prev)
    late = (before > _NONE) & (idx <= before - hold)
    return before, late


def plan_batch(
    spec: StreamSpec,
    marks: Marks,
    view: StoredView,
    ts_ms: np.ndarray,
    values: np.ndarray,
    *,
    backfill: bool = False,
    span_ms: tuple[int, int] | None = None,
) -> BatchPlan:
    """The windows a batch of *new* readings (arrival order, no stored timestamp among them)
    forms; see the module docstring for the rule. `span_ms` (backfill): the batch's oldest
    and newest timestamps, readings already stored included."""
    plan = BatchPlan()
    if backfill:
        return _plan_backfill(spec, marks, view, ts_ms, values, span_ms)
    if len(ts_ms) == 0:
        return plan
    s, h, reach = spec.stride, spec.hold_steps, spec.reach
    lateness = spec.lateness_windows
    idx = grid.grid_index(ts_ms / 1000.0, spec.period_s)
    stored_newest = int(grid.grid_index(marks.newest_ms / 1000.0, spec.period_s)) if marks.newest_ms is not None else _NONE
    prev = stored_newest
    before, late = _runs(idx, prev, h)
    # Counted as `late` in the response: too late to complete any window (past the limit).
    if lateness is not None:
        plan.late = int(np.count_nonzero(late & (idx + reach <= before - h - lateness * s)))
    plan.newest_idx = int(max(stored_newest, int(idx.max())))

    # Runs: a new run starts at every late reading (module docstring).
    starts = np.flatnonzero(late)
    starts = np.concatenate(([0], starts[starts > 0])).astype(np.int64)
    bounds = np.append(starts, len(idx))
    runs: list[tuple[int, int, np.ndarray, np.ndarray]] = []  # (a, b, candidates, may_be_formed)
    for a, b in zip(bounds[:-1].tolist(), bounds[1:].tolist()):
        r0 = int(before[a])
        r1 = max(r0, int(idx[a:b].max()))
        lo_new = r0 - h + 1 if r0 > _NONE else int(idx[a:b].min())
        newly = _ends_between(lo_new, r1 - h, s)
        touched = np.empty(0, np.int64)
        if late[a]:
            i = int(idx[a])
            lo_t = i if lateness is None else max(i, r0 - h - lateness * s + 1)
            touched = _ends_between(lo_t, min(i + reach, r0 - h), s)
        # Only a touched window, or one ending at or before the stored newest reading (a hold
        # made longer since), can have been formed already: those are looked up.
        runs.append((a, b, np.union1d(newly, touched), np.union1d(touched, newly[newly <= stored_newest])))
    return _form_runs(spec, marks, view, ts_ms, values, runs, plan)


def _plan_backfill(
    spec: StreamSpec, marks: Marks, view: StoredView, ts_ms: np.ndarray, values: np.ndarray, span_ms: tuple[int, int] | None
) -> BatchPlan:
    """A backfill forms every window ending from its oldest reading to hold_steps before its
    newest (readings already stored included) that is not scored yet, from every reading
    stored once the batch is."""
    plan = BatchPlan()
    if span_ms is None:
        if len(ts_ms) == 0:
            return plan
        span_ms = (int(ts_ms.min()), int(ts_ms.max()))
    lo, hi = (int(i) for i in grid.grid_index(np.asarray(span_ms, dtype=np.float64) / 1000.0, spec.period_s))
    cands = _ends_between(lo, hi - spec.hold_steps, spec.stride)
    if len(ts_ms):
        newest = int(grid.grid_index(int(ts_ms.max()) / 1000.0, spec.period_s))
        plan.newest_idx = newest if marks.newest_ms is None else max(newest, int(grid.grid_index(marks.newest_ms / 1000.0, spec.period_s)))
    return _form_runs(spec, marks, view, ts_ms, values, [(0, len(ts_ms), cands, cands)], plan)


def _form_runs(
    spec: StreamSpec, marks: Marks, view: StoredView, ts_ms: np.ndarray, values: np.ndarray,
    runs: list[tuple[int, int, np.ndarray, np.ndarray]], plan: BatchPlan,
) -> BatchPlan:
    """Form each run's candidate windows in turn (a run sees the readings up to its end)."""
    w, reach = spec.window, spec.reach
    all_cands = np.unique(np.concatenate([r[2] for r in runs]))
    if len(all_cands) == 0:
        return plan

    # Stored readings in reach of every candidate, and what is scored or recorded already.
    period_ms = spec.period_s * 1000.0
    maybe = np.unique(np.concatenate([r[3] for r in runs]))
    scored: set[int] = view.scored(int(maybe.min()), int(maybe.max())) if len(maybe) else set()
    recorded: set[int] = view.gaps(int(maybe.min()), int(maybe.max())) if len(maybe) else set()
    lo_ms = int(math.floor((int(all_cands.min()) - reach - 0.5) * period_ms))
    hi_ms = int(math.ceil((int(all_cands.max()) + 0.5) * period_ms))
    st_ts, st_vals = view.readings(lo_ms, hi_ms)
    first_ms: list[int | None] = []  # the asset's first stored reading, read once if needed

    status: dict[int, bool] = {}  # window end -> gap (True) or nothing (False) at its last attempt
    seg_ends: list[np.ndarray] = []
    for a, b, cands, _ in runs:
        cands = cands[~np.isin(cands, np.fromiter(scored, np.int64, len(scored)))] if scored else cands
        if len(cands) == 0:
            continue
        # The readings stored by the end of this run, in time order.
        ts_all = np.concatenate([st_ts, ts_ms[:b]])
        vals_all = np.concatenate([st_vals, values[:b]])
        order = np.argsort(ts_all, kind="stable")
        ts_all, vals_all = ts_all[order], vals_all[order]
        at = grid.grid_index(ts_all / 1000.0, spec.period_s)
        # Windows with no reading in reach are outage or warm-up: nothing to form.
        hit = np.searchsorted(at, cands, side="right") > np.searchsorted(at, cands - reach, side="left")
        cands = cands[hit]
        if len(cands) == 0:
            continue
        first_idx: int | None = None
        for cluster in _clusters(cands, reach):
            seg, gap_ends, nodata = _form(spec, ts_all, vals_all, cluster)
            if len(seg.ends):
                plan.segments.append(seg)
                seg_ends.append(seg.ends)
                scored.update(seg.ends.tolist())
                for e in seg.ends.tolist():
                    status.pop(e, None)
            if len(gap_ends):
                if first_idx is None:
                    if not first_ms:
                        first_ms.append(view.first_ms())
                    cands_first = [t for t in (first_ms[0], int(ts_ms[:b].min()) if b else None) if t is not None]
                    first_idx = int(grid.grid_index(min(cands_first) / 1000.0, spec.period_s))
                for e in gap_ends.tolist():
                    status[e] = (e - w + 1) >= first_idx
            for e in nodata.tolist():
                status.setdefault(e, False)
    if seg_ends:
        plan.ends = np.concatenate(seg_ends)
        seen = plan.ends.copy()
        last = marks.rule_last_idx if marks.rule_last_idx is not None else _NONE
        running = np.maximum.accumulate(np.concatenate(([last], seen)))[:-1]
        plan.rule_saw = seen > running
    gap_new = sorted(e for e, g in status.items() if g and e not in recorded)
    plan.gap_new = np.asarray(gap_new, dtype=np.int64)
    if recorded and len(plan.ends):
        plan.refilled = np.asarray(sorted(set(plan.ends.tolist()) & recorded), dtype=np.int64)
    return plan


def _clusters(ends: np.ndarray, reach: int) -> Iterator[np.ndarray]:
    """Runs of window ends whose reaches touch, so a long outage is not put on one grid."""
    cut = np.flatnonzero(np.diff(ends) > reach + 1) + 1
    yield from np.split(ends, cut)


def _form(spec: StreamSpec, ts_ms: np.ndarray, values: np.ndarray, ends: np.ndarray) -> tuple[Segment, np.ndarray, np.ndarray]:
    """Align and fill the readings around `ends`; (scoreable segment, gap ends holding data,
    ends holding no reading)."""
    w, f = spec.window, spec.max_fill_steps
    start, end = int(ends[0]) - spec.reach, int(ends[-1])
    aligned = grid.align(ts_ms / 1000.0, values, spec.period_s, start=start, end=end)
    filled = grid.Grid(aligned.start, grid.fill_gaps(aligned.values, f))
    hi = ends - start + 1
    lo = hi - w
    bad_before = np.concatenate(([0], np.cumsum(~np.all(np.isfinite(filled.values), axis=1))))
    ok = (bad_before[hi] - bad_before[lo]) == 0
    rest = ends[~ok]
    if len(rest):
        observed_before = np.concatenate(([0], np.cumsum(np.any(np.isfinite(aligned.values), axis=1))))
        holds = (observed_before[hi[~ok]] - observed_before[lo[~ok]]) > 0
        return Segment(filled, ends[ok]), rest[holds], rest[~holds]
    return Segment(filled, ends[ok]), rest, rest


# --- the alert rule over formed windows ---------------------------------------------------


def rule_steps(
    state: RuleState, scores: Sequence[float] | np.ndarray, rule: AlertRule, *, shelved: bool = False
) -> tuple[RuleState, list[Transition | None]]:
    """Feed the scores of the windows the rule sees, in order, through the one alert rule
    (service.alerting.steps, which `replay`, evaluate and the threshold preview run too)."""
    return steps(state, np.asarray(scores, dtype=np.float64).tolist(), rule, shelved)


# --- an asset held in memory: evaluate's replay and the core's tests ------------------------


class MemoryAsset:
    """One asset's stored rows in memory, with the same view and marks ingest reads from the
    database; `post` plans and applies one batch."""

    def __init__(self, spec: StreamSpec, channels: int) -> None:
        self.spec = spec
        self.ts_ms = np.empty(0, np.int64)
        self.values = np.empty((0, channels), np.float64)
        self.scored_ends: dict[int, bool] = {}  # window end -> the rule saw it
        self.gap_ends: set[int] = set()
        self.newest_ms: int | None = None
        self.rule_last_idx: int | None = None

    # StoredView
    def readings(self, lo_ms: int, hi_ms: int) -> tuple[np.ndarray, np.ndarray]:
        i, j = np.searchsorted(self.ts_ms, lo_ms, "left"), np.searchsorted(self.ts_ms, hi_ms, "right")
        return self.ts_ms[i:j], self.values[i:j]

    def scored(self, lo: int, hi: int) -> set[int]:
        return {e for e in self.scored_ends if lo <= e <= hi}

    def gaps(self, lo: int, hi: int) -> set[int]:
        return {e for e in self.gap_ends if lo <= e <= hi}

    def first_ms(self) -> int | None:
        return int(self.ts_ms[0]) if len(self.ts_ms) else None

    @property
    def marks(self) -> Marks:
        return Marks(self.newest_ms, self.rule_last_idx)

    def post(self, ts_ms: np.ndarray, values: np.ndarray, *, backfill: bool = False) -> tuple[BatchPlan, int]:
        """Store a batch (a timestamp already stored, or twice in the batch, keeps its first
        value: a file replayed here is not refused for it) and form its windows; (plan, new readings)."""
        ts_ms = np.asarray(ts_ms, dtype=np.int64)
        values = np.asarray(values, dtype=np.float64)
        span = (int(ts_ms.min()), int(ts_ms.max())) if len(ts_ms) else None
        keep = ~np.isin(ts_ms, self.ts_ms)
        ts_ms, values = ts_ms[keep], values[keep]
        _, first = np.unique(ts_ms, return_index=True)
        first.sort()
        ts_ms, values = ts_ms[first], values[first]
        plan = plan_batch(self.spec, self.marks, self, ts_ms, values, backfill=backfill, span_ms=span)
        if len(ts_ms):
            all_ts = np.concatenate([self.ts_ms, ts_ms])
            order = np.argsort(all_ts, kind="stable")
            self.ts_ms, self.values = all_ts[order], np.concatenate([self.values, values])[order]
            self.newest_ms = int(self.ts_ms[-1])
        for e, saw in zip(plan.ends.tolist(), plan.rule_saw.tolist()):
            self.scored_ends[e] = saw
        self.gap_ends.update(plan.gap_new.tolist())
        self.gap_ends.difference_update(plan.refilled.tolist())
        if np.any(plan.rule_saw):
            self.rule_last_idx = int(plan.ends[plan.rule_saw][-1])
        return plan, len(ts_ms)


def replay_series(
    spec: StreamSpec, ts_s: np.ndarray, values: np.ndarray, *, batch: int = 5000,
    on_plan: Callable[[BatchPlan], None] | None = None,
) -> MemoryAsset:
    """Feed one asset's readings (arrival order) through the core in batches of `batch`, as
    `kilter replay` posts them; `on_plan` sees each batch's plan (to cut and score its windows)."""
    asset = MemoryAsset(spec, values.shape[1])
    ts_ms = np.round(np.asarray(ts_s, dtype=np.float64) * 1000).astype(np.int64)
    for i in range(0, len(ts_ms), batch):
        plan, _ = asset.post(ts_ms[i : i + batch], values[i : i + batch])
        if on_plan is not None:
            on_plan(plan)
    return asset
