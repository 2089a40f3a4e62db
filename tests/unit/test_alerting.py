"""The alert rule (service/alerting.py): on-delay k of n, escalation, off-delay with
deadband, one active alert, shelving, and rebuilding the state from stored history."""

from __future__ import annotations

from hypothesis import given, settings
from hypothesis import strategies as st

from service.alerting import AlertRule, RuleState, replay, step

RULE = AlertRule(warning=1.0, critical=3.0, on_k=3, on_n=5, off_m=4, deadband_frac=0.2)


def run(scores: list[float], rule: AlertRule = RULE, shelved: list[bool] | None = None) -> list[tuple[int, str, str]]:
    state, out = RuleState(), []
    for i, s in enumerate(scores):
        state, t = step(state, s, rule, shelved=bool(shelved[i]) if shelved else False)
        if t is not None:
            out.append((i, t.kind, t.severity))
    return out


def test_on_delay_needs_k_of_last_n() -> None:
    # Two high windows in five do not open; the third within the last five does.
    assert run([1.5, 0.1, 1.5, 0.1, 0.1]) == []
    assert run([1.5, 0.1, 1.5, 0.1, 1.2]) == [(4, "open", "warning")]
    # Highs spread wider than n apart never open.
    assert run([1.5, 0, 0, 0, 0, 1.5, 0, 0, 0, 0, 1.5]) == []


def test_threshold_is_inclusive() -> None:
    assert run([1.0, 1.0, 1.0]) == [(2, "open", "warning")]
    assert run([0.999, 0.999, 0.999, 0.999, 0.999]) == []


def test_opens_critical_directly_and_escalates() -> None:
    assert run([3.5, 3.5, 3.5]) == [(2, "open", "critical")]
    events = run([1.5, 1.5, 1.5, 3.2, 3.3, 3.1])
    assert events == [(2, "open", "warning"), (5, "escalate", "critical")]


def test_off_delay_with_deadband() -> None:
    # Clear level is warning * (1 - 0.2) = 0.8: scores of 0.9 are below warning but inside
    # the deadband, so they hold the alert; four consecutive < 0.8 return it.
    scores = [1.5, 1.5, 1.5] + [0.9] * 10 + [0.5, 0.5, 0.5] + [0.5]
    events = run(scores)
    assert events == [(2, "open", "warning"), (16, "return", "warning")]


def test_off_delay_restarts_on_a_high_window() -> None:
    scores = [1.5, 1.5, 1.5, 0.1, 0.1, 0.1, 1.1, 0.1, 0.1, 0.1, 0.1]
    assert run(scores) == [(2, "open", "warning"), (10, "return", "warning")]


def test_one_active_alert_at_a_time_and_reopen_after_return() -> None:
    scores = [2.0] * 10 + [0.0] * 4 + [2.0] * 3
    events = run(scores)
    assert [e[1] for e in events] == ["open", "return", "open"]
    assert events[1][0] == 13 and events[2][0] == 16


def test_shelved_opens_nothing_but_active_alert_still_escalates_and_returns() -> None:
    scores = [2.0] * 6
    assert run(scores, shelved=[True] * 6) == []
    # Opened before shelving; shelving later does not stop escalation or return.
    scores = [1.5, 1.5, 1.5, 3.5, 3.5, 3.5, 0, 0, 0, 0]
    shelved = [False, False, False] + [True] * 7
    assert run(scores, shelved=shelved) == [(2, "open", "warning"), (5, "escalate", "critical"), (9, "return", "critical")]


def test_replay_spans_match_step_events() -> None:
    scores = [0.1, 1.5, 1.5, 1.5, 4.0, 0.2, 0.2, 0.2, 0.2, 0.2]
    spans = replay(scores, RULE)
    assert len(spans) == 1
    s = spans[0]
    assert (s.start, s.severity, s.peak, s.peak_index, s.returned) == (3, "warning", 4.0, 4, True)


scores_st = st.lists(st.floats(min_value=0.0, max_value=5.0, allow_nan=False), min_size=1, max_size=80)


@settings(max_examples=150, deadline=None)
@given(scores=scores_st, cut=st.integers(min_value=0, max_value=80),
       k=st.integers(1, 4), extra_n=st.integers(0, 3), m=st.integers(1, 5))
def test_from_history_equals_streaming(scores: list[float], cut: int, k: int, extra_n: int, m: int) -> None:
    """Rebuilding the state from the stored scores and the open alert (as every service
    replica does per request) gives the same transitions as one uninterrupted stream."""
    rule = AlertRule(warning=1.0, critical=2.5, on_k=k, on_n=k + extra_n, off_m=m, deadband_frac=0.1)
    cut = min(cut, len(scores))
    streamed = run(scores, rule)

    state, events = RuleState(), []
    for i, s in enumerate(scores[:cut]):
        state, t = step(state, s, rule)
        if t is not None:
            events.append((i, t.kind, t.severity))
    rebuilt = RuleState.from_history(scores[:cut], state.active, rule)
    for i, s in enumerate(scores[cut:], start=cut):
        rebuilt, t = step(rebuilt, s, rule)
        if t is not None:
            events.append((i, t.kind, t.severity))
    assert events == streamed


@settings(max_examples=100, deadline=None)
@given(scores=scores_st)
def test_at_most_one_active_and_returns_alternate(scores: list[float]) -> None:
    kinds = [e[1] for e in run(scores) if e[1] != "escalate"]
    # Opens and returns strictly alternate, starting with an open.
    assert all(kind == ("open" if i % 2 == 0 else "return") for i, kind in enumerate(kinds))
