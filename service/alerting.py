"""The alert rule, as pure functions over a sequence of window scores.

One rule for the service, `kilter evaluate` and the threshold preview:

* open   when k of the last n windows score >= warning (on-delay); severity is critical
         when k of the last n also score >= critical;
* escalate a warning alert to critical the same way (k of n >= critical);
* return to normal after m consecutive windows below warning * (1 - deadband_frac)
         (off-delay with deadband);
* one active alert per asset: further windows extend it and raise its peak;
* shelved: no new alert opens, an active one may still escalate and return; scores are
  still stored.

The state the rule needs is only the last max(n, m) scores and the active alert's
severity, so the service can rebuild it from stored scores on any replica
(`RuleState.from_history`); nothing lives only in one process's memory.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING, Any, Literal, Protocol

import numpy as np

if TYPE_CHECKING:
    from service.manifest import Manifest

Severity = Literal["warning", "critical"]
TransitionKind = Literal["open", "escalate", "return"]


@dataclass(frozen=True)
class AlertRule:
    warning: float
    critical: float
    on_k: int = 3
    on_n: int = 5
    off_m: int = 6
    deadband_frac: float = 0.1

    def __post_init__(self) -> None:
        if not (self.warning > 0 and self.critical >= self.warning):
            raise ValueError(f"need 0 < warning <= critical, got warning={self.warning}, critical={self.critical}")
        if not (1 <= self.on_k <= self.on_n):
            raise ValueError(f"need 1 <= on_k <= on_n, got k={self.on_k}, n={self.on_n}")
        if self.off_m < 1:
            raise ValueError(f"off_m must be >= 1, got {self.off_m}")
        if not (0 <= self.deadband_frac < 1):
            raise ValueError(f"deadband_frac must be in [0, 1), got {self.deadband_frac}")

    @property
    def clear_level(self) -> float:
        """Scores below this count towards the return to normal."""
        return self.warning * (1.0 - self.deadband_frac)

    @property
    def memory(self) -> int:
        """How many recent scores the rule needs to remember."""
        return max(self.on_n, self.off_m)

    def with_thresholds(self, warning: float, critical: float | None = None) -> AlertRule:
        """Same timing, new levels; critical keeps its ratio to warning unless given."""
        if critical is None:
            critical = warning * (self.critical / self.warning)
        return replace(self, warning=warning, critical=max(critical, warning))


TIMING = ("on_k", "on_n", "off_m", "deadband_frac")


class RuleSettings(Protocol):
    """Anything carrying a rule's levels and timing: a stored threshold version or its row."""

    warning: float
    critical: float
    on_k: int
    on_n: int
    off_m: int
    deadband_frac: float


def rule_of(settings: RuleSettings, override: dict[str, Any] | None = None) -> AlertRule:
    """The one builder of the rule in force from a threshold version; `override` (the asset's
    rule_override: on_k, on_n, off_m, deadband_frac) replaces the timing fields it gives."""
    timing = {k: getattr(settings, k) for k in TIMING}
    for k in TIMING:
        if override and override.get(k) is not None:
            timing[k] = override[k]
    return AlertRule(warning=float(settings.warning), critical=float(settings.critical), **timing)


def manifest_rule(manifest: Manifest) -> AlertRule:
    """The rule a model ships with: the manifest's thresholds and alert timing."""
    t, r = manifest.thresholds, manifest.alert_rule
    return AlertRule(t.warning, t.critical, r.on_k, r.on_n, r.off_m, r.deadband_frac)


@dataclass(frozen=True)
class RuleState:
    """The last `rule.memory` scores (oldest first) and the active alert's severity, if any."""

    recent: tuple[float, ...] = ()
    active: Severity | None = None

    @classmethod
    def from_history(cls, recent_scores: Sequence[float], active: Severity | None, rule: AlertRule) -> RuleState:
        """Rebuild the state from stored scores (oldest first) and the open alert, if any."""
        tail = tuple(float(s) for s in recent_scores)[-rule.memory :]
        return cls(recent=tail, active=active)


@dataclass(frozen=True)
class Transition:
    kind: TransitionKind
    severity: Severity


def _count_at_or_above(scores: Sequence[float], level: float, n: int) -> int:
    return sum(1 for s in scores[-n:] if s >= level)


def _below_run(scores: Sequence[float], level: float) -> int:
    run = 0
    for s in reversed(scores):
        if s < level:
            run += 1
        else:
            break
    return run


def step(state: RuleState, score: float, rule: AlertRule, shelved: bool = False) -> tuple[RuleState, Transition | None]:
    """Feed one window score; returns the new state and the transition it caused, if any."""
    recent = (state.recent + (float(score),))[-rule.memory :]
    k, n = rule.on_k, rule.on_n
    warn_hits = _count_at_or_above(recent, rule.warning, n)
    crit_hits = _count_at_or_above(recent, rule.critical, n)

    if state.active is None:
        if shelved or warn_hits < k:
            return RuleState(recent, None), None
        severity: Severity = "critical" if crit_hits >= k else "warning"
        return RuleState(recent, severity), Transition("open", severity)

    # An active alert: may return (off-delay with deadband), else may escalate.
    # The open window scored >= warning > clear level, so the trailing run of low scores
    # never reaches back before the alert opened.
    if _below_run(recent, rule.clear_level) >= rule.off_m:
        return RuleState(recent, None), Transition("return", state.active)
    if state.active == "warning" and crit_hits >= k:
        return RuleState(recent, "critical"), Transition("escalate", "critical")
    return RuleState(recent, state.active), None


def steps(
    state: RuleState, scores: Iterable[float], rule: AlertRule, shelved: Sequence[bool] | np.ndarray | bool = False
) -> tuple[RuleState, list[Transition | None]]:
    """Feed scores in order (the one loop the service, `replay` and the preview share); the
    final state and each score's transition. `shelved`: one flag, or one per score."""
    out: list[Transition | None] = []
    for i, score in enumerate(scores):
        flag = shelved if isinstance(shelved, bool) else bool(shelved[i])
        state, t = step(state, score, rule, shelved=flag)
        out.append(t)
    return state, out


@dataclass
class AlertSpan:
    """One alert as `replay` found it; indexes into the score sequence given to it."""

    start: int  # the window that opened it
    end: int  # the last window it was active in (the returning window, or the last one given)
    severity: Severity  # the highest severity it reached
    peak: float
    peak_index: int
    returned: bool
    escalated_at: int | None = None
    history: list[tuple[int, TransitionKind, Severity]] = field(default_factory=list)


def replay(
    scores: Iterable[float],
    rule: AlertRule,
    shelved: Sequence[bool] | np.ndarray | None = None,
) -> list[AlertSpan]:
    """Run the rule over a whole score sequence (time order), from a quiet state, and list the alerts it raises."""
    scores = [float(x) for x in scores]
    _, transitions = steps(RuleState(), scores, rule, shelved if shelved is not None else False)
    spans: list[AlertSpan] = []
    current: AlertSpan | None = None
    for i, (score, transition) in enumerate(zip(scores, transitions)):
        if transition is not None and transition.kind == "open":
            current = AlertSpan(i, i, transition.severity, float(score), i, False)
            current.history.append((i, "open", transition.severity))
            spans.append(current)
        if current is not None:
            current.end = i
            if score > current.peak:
                current.peak, current.peak_index = float(score), i
            if transition is not None and transition.kind == "escalate":
                current.severity = "critical"
                current.escalated_at = i
                current.history.append((i, "escalate", "critical"))
            if transition is not None and transition.kind == "return":
                current.returned = True
                current.history.append((i, "return", current.severity))
                current = None
    return spans


def count_alerts(scores: Iterable[float], rule: AlertRule) -> int:
    """How many alerts the rule opens on this sequence."""
    return len(replay(scores, rule))
