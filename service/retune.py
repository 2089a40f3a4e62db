"""Threshold preview: what a proposed alert rule would have done on an asset's stored scores.

Pure functions over numpy arrays and dataclasses (no database, no HTTP); the threshold
endpoints and the dashboard call them with rows read by service/db/thresholds.py.

* `would_open` replays a score series (window-end order) through service.alerting.replay
  and turns its spans into times. The replay starts from a quiet rule state at the first
  window given: an alert already active before the range shows up only if the rule
  re-opens it inside the range. Shelving is not replayed (past shelving is in the audit
  log, not per window): the preview answers "what would this rule open", shelves aside.
* `count_overlaps` counts proposed alerts whose span meets at least one past alert with a
  given outcome (closed as confirmed_fault or false_alarm), so an operator reads "3 would
  open, 2 of them where people said false alarm".
* `propose_rule` builds the rule an operator proposes (levels by value or by budget, rule
  timing) from the rule in force; the API and the dashboard both use it.
* `calibration_set` / `expected_false_alarms_per_week` / `levels_for_budget` convert
  between a warning level and false alarms per asset-week on the model's held-out normal
  calibration scores (service.thresholds), the same conversion the trainer used.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, replace
from typing import Literal

import numpy as np

from service.alerting import AlertRule, Severity, replay
from service.manifest import CalibrationScores, Manifest
from service.thresholds import CalibrationSet, ThresholdChoice, expected_alerts_per_week, threshold_for_budget

Outcome = Literal["confirmed_fault", "false_alarm", "planned_work", "unknown"]


@dataclass(frozen=True)
class ScoreSeries:
    """Stored window scores of one asset in window-end order."""

    window_end_ms: np.ndarray  # (N,) int64 epoch milliseconds, strictly increasing
    score: np.ndarray  # (N,) float64

    def __post_init__(self) -> None:
        ends = np.asarray(self.window_end_ms, dtype=np.int64)
        scores = np.asarray(self.score, dtype=np.float64)
        if ends.shape != scores.shape or ends.ndim != 1:
            raise ValueError(f"window_end_ms and score must be 1-D of one length, got {ends.shape} and {scores.shape}")
        if len(ends) > 1 and not np.all(np.diff(ends) > 0):
            raise ValueError("window_end_ms must be strictly increasing (one score per window, in order)")
        object.__setattr__(self, "window_end_ms", ends)
        object.__setattr__(self, "score", scores)

    def __len__(self) -> int:
        return len(self.score)


@dataclass(frozen=True)
class ProposedAlert:
    """One alert the proposed rule would have opened, in epoch milliseconds (window ends)."""

    start_ms: int  # end of the window that opened it
    end_ms: int  # end of the last window it was active in
    severity: Severity  # highest severity reached
    peak: float
    peak_at_ms: int
    returned: bool  # False: still active at the end of the range


@dataclass(frozen=True)
class PastAlert:
    """An alert already stored, reduced to what the overlap count needs."""

    alert_id: int
    start_ms: int
    end_ms: int  # returned_at, else last_seen_at
    outcome: Outcome | None  # None while not closed


def would_open(series: ScoreSeries, rule: AlertRule) -> list[ProposedAlert]:
    """The alerts `rule` opens on `series`, replayed from a quiet state at its first window."""
    ends = series.window_end_ms
    return [
        ProposedAlert(
            start_ms=int(ends[span.start]),
            end_ms=int(ends[span.end]),
            severity=span.severity,
            peak=float(span.peak),
            peak_at_ms=int(ends[span.peak_index]),
            returned=span.returned,
        )
        for span in replay(series.score, rule)
    ]


def _meets(a_start: int, a_end: int, b_start: int, b_end: int) -> bool:
    return a_start <= b_end and b_start <= a_end


def count_overlaps(proposed: Iterable[ProposedAlert], past: Sequence[PastAlert], outcome: Outcome) -> int:
    """How many proposed alerts meet (closed intervals) at least one past alert closed as `outcome`."""
    marked = [p for p in past if p.outcome == outcome]
    return sum(1 for a in proposed if any(_meets(a.start_ms, a.end_ms, p.start_ms, p.end_ms) for p in marked))


def calibration_set(calibration: CalibrationScores, manifest: Manifest) -> CalibrationSet:
    """The model's held-out normal scores as a CalibrationSet (one series per asset, time order).

    The time covered is the manifest's calibration span (what the trainer measured) when it
    states one; otherwise each asset's series counts one window period per score.
    """
    series = [np.asarray(s.score, dtype=np.float64) for s in calibration.assets.values() if s.score]
    if not series:
        raise ValueError(f"model {manifest.model_id}/{manifest.version}: calibration scores are empty")
    window_period_s = manifest.window_period_s
    span_s = manifest.thresholds.calibration.span_s
    if not span_s > 0:
        span_s = float(sum(len(s) for s in series)) * window_period_s
    return CalibrationSet(series=series, span_s=span_s, window_period_s=window_period_s)


def expected_false_alarms_per_week(cal: CalibrationSet, rule: AlertRule, warning: float) -> float | None:
    """False alerts per asset-week a warning level would raise on normal data, or None when
    the calibration data can say nothing (too few scores above the tail-fit threshold)."""
    try:
        return float(expected_alerts_per_week(cal, rule, warning))
    except ValueError:
        return None


@dataclass(frozen=True)
class BudgetLevels:
    warning: float
    critical: float
    choice: ThresholdChoice  # how the warning level was found (empirical or peaks over threshold)


def levels_for_budget(cal: CalibrationSet, rule: AlertRule, false_alarms_per_week: float) -> BudgetLevels:
    """Warning level for a false-alarm budget; critical keeps the rule's critical/warning ratio."""
    choice = threshold_for_budget(cal, rule, false_alarms_per_week)
    warning = float(choice.threshold)
    critical = warning * (rule.critical / rule.warning)
    return BudgetLevels(warning=warning, critical=critical, choice=choice)


@dataclass(frozen=True)
class Proposal:
    rule: AlertRule
    budget: BudgetLevels | None  # set when the levels came from a false-alarm budget


TIMING_FIELDS = ("on_k", "on_n", "off_m", "deadband_frac")


def propose_rule(
    current: AlertRule,
    *,
    warning: float | None = None,
    critical: float | None = None,
    false_alarms_per_week: float | None = None,
    on_k: int | None = None,
    on_n: int | None = None,
    off_m: int | None = None,
    deadband_frac: float | None = None,
    cal: CalibrationSet | None = None,
) -> Proposal:
    """The rule an operator proposes, from the rule in force and what they changed.

    Timing given overrides the timing in force. Levels: `warning` (with `critical`, else
    critical keeps the critical/warning ratio in force), or `false_alarms_per_week` (the
    warning level for that budget on `cal` under the proposed timing, critical at the same
    ratio), or unchanged. ValueError (saying which) for an impossible combination.
    """
    if false_alarms_per_week is not None and (warning is not None or critical is not None):
        raise ValueError("give either warning (and optional critical) or false_alarms_per_week, not both")
    if critical is not None and warning is None:
        raise ValueError("critical needs warning beside it")
    given = {"on_k": on_k, "on_n": on_n, "off_m": off_m, "deadband_frac": deadband_frac}
    timing = {f: given[f] if given[f] is not None else getattr(current, f) for f in TIMING_FIELDS}
    base = replace(current, **timing)  # the rule in force with the proposed timing; ValueError on bad timing
    if false_alarms_per_week is not None:
        if cal is None:
            raise ValueError("a false-alarm budget needs the model's calibration scores, and there are none")
        levels = levels_for_budget(cal, base, false_alarms_per_week)
        return Proposal(base.with_thresholds(levels.warning, levels.critical), levels)
    if warning is not None:
        if critical is not None and critical < warning:
            raise ValueError(f"critical ({critical}) must be >= warning ({warning})")
        return Proposal(base.with_thresholds(warning, critical), None)
    return Proposal(base, None)


@dataclass(frozen=True)
class Preview:
    """Proposed rule against the current one over the same stored scores."""

    rule: AlertRule
    proposed: list[ProposedAlert]
    current: list[ProposedAlert]
    overlap_confirmed_fault: int
    overlap_false_alarm: int
    windows: int  # scores replayed
    first_window_end_ms: int | None
    last_window_end_ms: int | None
    expected_false_alarms_per_week: float | None
    current_expected_false_alarms_per_week: float | None


def preview(
    series: ScoreSeries,
    proposed_rule: AlertRule,
    current_rule: AlertRule,
    past: Sequence[PastAlert],
    cal: CalibrationSet | None,
) -> Preview:
    """Replay `series` through both rules, count overlaps with worked alerts, add calibration rates."""
    proposed = would_open(series, proposed_rule)
    current = would_open(series, current_rule)
    return Preview(
        rule=proposed_rule,
        proposed=proposed,
        current=current,
        overlap_confirmed_fault=count_overlaps(proposed, past, "confirmed_fault"),
        overlap_false_alarm=count_overlaps(proposed, past, "false_alarm"),
        windows=len(series),
        first_window_end_ms=int(series.window_end_ms[0]) if len(series) else None,
        last_window_end_ms=int(series.window_end_ms[-1]) if len(series) else None,
        expected_false_alarms_per_week=(
            expected_false_alarms_per_week(cal, proposed_rule, proposed_rule.warning) if cal is not None else None
        ),
        current_expected_false_alarms_per_week=(
            expected_false_alarms_per_week(cal, current_rule, current_rule.warning) if cal is not None else None
        ),
    )
