"""Detection-quality figures: event-wise precision/recall, detection delay, false alarms per
asset-week, and window-level ROC-AUC, PR-AUC and F1 (numpy only, pure functions).

Definitions (stated once, here; `kilter evaluate` prints them beside the table):

* A window ending at time e covers grid points e-(W-1)*period .. e. It is *labelled
  abnormal* when that span intersects a labelled fault [start, end]. Windows that touch an
  ignored period (kind `maintenance` by default: planned work, neither a fault nor normal)
  are left out of the window-level figures.
* An alert is the interval [open, last active] in window-end times, as
  service.alerting.replay reports it. It *matches* a fault when it overlaps
  [fault.start, fault.end + tolerance_s]. The default tolerance is one window span: a
  window ending up to that long after the fault's end still contains fault readings.
* Event recall = faults matched by at least one alert / faults. Event precision = alerts
  matching a fault / alerts that are not wholly inside ignored periods (an alert that
  overlaps only planned work is neither right nor wrong and is not counted).
* Detection delay of a caught fault = time of the first matching alert's opening minus the
  fault's start, clipped at 0 (an alert already open when the fault starts is delay 0).
* A false alarm is an alert matching no fault and no ignored period. The rate divides by
  the evaluated time: scored windows x the time between window ends, summed over assets.
* Window-level F1 (no point adjustment) takes "score >= warning threshold" as the
  window's prediction. Point-adjusted F1 (every window of a labelled segment counts as
  detected once any of them is) is only ever reported beside it: on its own it makes even
  random scores look good (Kim et al., "Towards a Rigorous Evaluation of Time-series
  Anomaly Detection", AAAI 2022, arXiv:2109.05257).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Protocol

import numpy as np

WEEK_S = 7 * 86400.0
DEFAULT_IGNORE_KINDS = frozenset({"maintenance"})

# The keys of one row of `kilter evaluate --json` (issue 5), in table order.
FIGURE_KEYS = (
    "event_precision",
    "event_recall",
    "event_f1",
    "false_alarms_per_asset_week",
    "median_delay_s",
    "worst_delay_s",
    "roc_auc",
    "pr_auc",
    "f1",
)


class EventLike(Protocol):
    asset: str
    start_s: float
    end_s: float
    kind: str


@dataclass(frozen=True)
class Track:
    """One asset's scored windows and the alerts the rule raised on them.

    `end_s` are window-end times (UTC epoch seconds, increasing); `alerts` are
    (open_s, last_active_s) in the same times.
    """

    asset: str
    end_s: np.ndarray
    score: np.ndarray
    alerts: Sequence[tuple[float, float]]


@dataclass(frozen=True)
class EventOutcome:
    asset: str
    kind: str
    start_s: float
    end_s: float
    caught: bool
    delay_s: float | None


@dataclass(frozen=True)
class EventScores:
    precision: float
    recall: float
    f1: float
    alerts: int  # counted alerts (not wholly inside ignored periods)
    true_alerts: int
    false_alarms: int
    evaluated_s: float
    outcomes: list[EventOutcome] = field(default_factory=list)

    @property
    def false_alarms_per_asset_week(self) -> float:
        return self.false_alarms / (self.evaluated_s / WEEK_S) if self.evaluated_s > 0 else math.nan

    @property
    def delays_s(self) -> np.ndarray:
        return np.array([o.delay_s for o in self.outcomes if o.caught], dtype=np.float64)

    @property
    def median_delay_s(self) -> float:
        d = self.delays_s
        return float(np.median(d)) if len(d) else math.nan

    @property
    def worst_delay_s(self) -> float:
        d = self.delays_s
        return float(d.max()) if len(d) else math.nan

    def recall_by_kind(self) -> dict[str, tuple[int, int]]:
        """kind -> (caught, total)."""
        out: dict[str, tuple[int, int]] = {}
        for o in self.outcomes:
            c, t = out.get(o.kind, (0, 0))
            out[o.kind] = (c + int(o.caught), t + 1)
        return dict(sorted(out.items()))


def _harmonic(p: float, r: float) -> float:
    if not (p + r > 0):
        return 0.0 if not (math.isnan(p) or math.isnan(r)) else math.nan
    return 2 * p * r / (p + r)


def _overlaps(a0: float, a1: float, b0: float, b1: float) -> bool:
    return a0 <= b1 and a1 >= b0


def event_scores(
    tracks: Iterable[Track],
    events: Iterable[EventLike],
    window_period_s: float,
    tolerance_s: float,
    ignore_kinds: Iterable[str] = DEFAULT_IGNORE_KINDS,
) -> EventScores:
    """Event-wise precision/recall/F1, delays and false alarms (see the module docstring).

    Only faults that overlap an asset's evaluated stretch (first to last window end, plus
    the tolerance) count towards recall, so a fault outside the replayed data is not a miss.
    """
    if tolerance_s < 0:
        raise ValueError(f"tolerance_s must be >= 0, got {tolerance_s}")
    ignore = frozenset(ignore_kinds)
    by_asset: dict[str, list[EventLike]] = {}
    for ev in events:
        by_asset.setdefault(ev.asset, []).append(ev)
    outcomes: list[EventOutcome] = []
    counted = true_alerts = false_alarms = 0
    evaluated_s = 0.0
    for track in tracks:
        ends = np.asarray(track.end_s, dtype=np.float64)
        if len(ends) == 0:
            continue
        evaluated_s += len(ends) * window_period_s
        evs = by_asset.get(track.asset, [])
        faults = [e for e in evs if e.kind not in ignore]
        planned = [e for e in evs if e.kind in ignore]
        first, last = float(ends[0]), float(ends[-1])
        for alert_open, alert_last in track.alerts:
            hits_fault = any(_overlaps(alert_open, alert_last, f.start_s, f.end_s + tolerance_s) for f in faults)
            if hits_fault:
                counted += 1
                true_alerts += 1
                continue
            if any(_overlaps(alert_open, alert_last, p.start_s, p.end_s + tolerance_s) for p in planned):
                continue  # planned work: neither right nor wrong
            counted += 1
            false_alarms += 1
        for f in faults:
            if not _overlaps(f.start_s, f.end_s + tolerance_s, first, last):
                continue
            opens = [a0 for a0, a1 in track.alerts if _overlaps(a0, a1, f.start_s, f.end_s + tolerance_s)]
            caught = bool(opens)
            delay = max(0.0, min(opens) - f.start_s) if caught else None
            outcomes.append(EventOutcome(track.asset, f.kind, f.start_s, f.end_s, caught, delay))
    precision = true_alerts / counted if counted else math.nan
    recall = sum(o.caught for o in outcomes) / len(outcomes) if outcomes else math.nan
    return EventScores(
        precision=precision,
        recall=recall,
        f1=_harmonic(precision, recall),
        alerts=counted,
        true_alerts=true_alerts,
        false_alarms=false_alarms,
        evaluated_s=evaluated_s,
        outcomes=outcomes,
    )


def window_labels(
    end_s: np.ndarray,
    window_span_s: float,
    sample_period_s: float,
    events: Iterable[EventLike],
    ignore_kinds: Iterable[str] = DEFAULT_IGNORE_KINDS,
) -> tuple[np.ndarray, np.ndarray]:
    """(abnormal, keep) boolean arrays for windows ending at `end_s` of one asset's events.

    A window spans [end - window_span + period, end]. `abnormal` marks windows touching a
    fault; `keep` is False for windows touching an ignored period.
    """
    ends = np.asarray(end_s, dtype=np.float64)
    starts = ends - (window_span_s - sample_period_s)
    abnormal = np.zeros(len(ends), dtype=bool)
    keep = np.ones(len(ends), dtype=bool)
    ignore = frozenset(ignore_kinds)
    for ev in events:
        touch = (starts <= ev.end_s) & (ends >= ev.start_s)
        if ev.kind in ignore:
            keep &= ~touch
        else:
            abnormal |= touch
    return abnormal, keep


def _check_binary(labels: np.ndarray, scores: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    y = np.asarray(labels).astype(bool).ravel()
    s = np.asarray(scores, dtype=np.float64).ravel()
    if len(y) != len(s):
        raise ValueError(f"labels ({len(y)}) and scores ({len(s)}) differ in length")
    if not np.all(np.isfinite(s)):
        raise ValueError("scores contain NaN or infinity")
    return y, s


def roc_auc(labels: np.ndarray, scores: np.ndarray) -> float:
    """Area under the ROC curve: P(score of an abnormal > score of a normal), ties half.

    Computed from mid-ranks (the Mann-Whitney U statistic). NaN when one class is absent.
    """
    y, s = _check_binary(labels, scores)
    n_pos, n_neg = int(y.sum()), int((~y).sum())
    if n_pos == 0 or n_neg == 0:
        return math.nan
    order = np.argsort(s, kind="mergesort")
    sorted_s = s[order]
    ranks = np.empty(len(s), dtype=np.float64)
    # Mid-rank of each tie group (1-based ranks).
    uniq, first, counts = np.unique(sorted_s, return_index=True, return_counts=True)
    mid = first + (counts + 1) / 2.0
    ranks[order] = np.repeat(mid, counts)
    u = ranks[y].sum() - n_pos * (n_pos + 1) / 2.0
    return float(u / (n_pos * n_neg))


def average_precision(labels: np.ndarray, scores: np.ndarray) -> float:
    """PR-AUC as average precision: sum over score levels of (R_k - R_(k-1)) * P_k.

    Thresholds at every distinct score, highest first; the step-wise sum with no
    interpolation. NaN when there is no abnormal window.
    """
    y, s = _check_binary(labels, scores)
    n_pos = int(y.sum())
    if n_pos == 0:
        return math.nan
    order = np.argsort(-s, kind="mergesort")
    s_sorted, y_sorted = s[order], y[order]
    tp = np.cumsum(y_sorted)
    fp = np.cumsum(~y_sorted)
    # Keep the last position of each distinct score (a threshold takes the whole tie group).
    last_of_level = np.r_[np.diff(s_sorted) != 0, True]
    tp, fp = tp[last_of_level], fp[last_of_level]
    precision = tp / (tp + fp)
    recall = tp / n_pos
    d_recall = np.diff(np.r_[0.0, recall])
    return float(np.sum(d_recall * precision))


def f1_score(labels: np.ndarray, predicted: np.ndarray) -> float:
    """F1 of boolean predictions against boolean labels; 0 when nothing is predicted or true."""
    y = np.asarray(labels).astype(bool).ravel()
    p = np.asarray(predicted).astype(bool).ravel()
    if len(y) != len(p):
        raise ValueError(f"labels ({len(y)}) and predictions ({len(p)}) differ in length")
    tp = int(np.sum(y & p))
    denom = int(y.sum() + p.sum())
    return 2 * tp / denom if denom else 0.0


def point_adjust(labels: np.ndarray, predicted: np.ndarray) -> np.ndarray:
    """Predictions with every contiguous labelled segment set True where any of it is True.

    For showing *beside* unadjusted F1 only (Kim et al., AAAI 2022, arXiv:2109.05257).
    Segments are runs of consecutive True labels in the given order.
    """
    y = np.asarray(labels).astype(bool).ravel()
    p = np.asarray(predicted).astype(bool).ravel().copy()
    if len(y) != len(p):
        raise ValueError(f"labels ({len(y)}) and predictions ({len(p)}) differ in length")
    edges = np.diff(np.r_[0, y.astype(np.int8), 0])
    for a, b in zip(np.flatnonzero(edges == 1), np.flatnonzero(edges == -1), strict=True):
        if p[a:b].any():
            p[a:b] = True
    return p


@dataclass(frozen=True)
class WindowScores:
    roc_auc: float
    pr_auc: float
    f1: float
    f1_point_adjusted: float
    windows: int
    abnormal_windows: int


def window_scores(
    labels_per_asset: Sequence[np.ndarray], scores_per_asset: Sequence[np.ndarray], warning: float
) -> WindowScores:
    """Window-level figures pooled over assets; each asset's arrays in time order.

    Point adjustment runs per asset (a segment never joins two assets' windows).
    """
    if len(labels_per_asset) != len(scores_per_asset):
        raise ValueError("one label array per score array is needed")
    ys, ss, pa = [], [], []
    for y, s in zip(labels_per_asset, scores_per_asset, strict=True):
        y, s = _check_binary(y, s)
        ys.append(y)
        ss.append(s)
        pa.append(point_adjust(y, s >= warning))
    y = np.concatenate(ys) if ys else np.empty(0, bool)
    s = np.concatenate(ss) if ss else np.empty(0)
    pred = s >= warning
    return WindowScores(
        roc_auc=roc_auc(y, s),
        pr_auc=average_precision(y, s),
        f1=f1_score(y, pred),
        f1_point_adjusted=f1_score(y, np.concatenate(pa) if pa else np.empty(0, bool)),
        windows=len(y),
        abnormal_windows=int(y.sum()),
    )


def figures(ev: EventScores, win: WindowScores) -> dict[str, float]:
    """One row of the --json output, keys as in FIGURE_KEYS (NaN becomes None when written)."""
    return {
        "event_precision": ev.precision,
        "event_recall": ev.recall,
        "event_f1": ev.f1,
        "false_alarms_per_asset_week": ev.false_alarms_per_asset_week,
        "median_delay_s": ev.median_delay_s,
        "worst_delay_s": ev.worst_delay_s,
        "roc_auc": win.roc_auc,
        "pr_auc": win.pr_auc,
        "f1": win.f1,
    }
