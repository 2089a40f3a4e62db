"""service/retune_risk.py: when a threshold change needs a named confirmation."""

from __future__ import annotations

import pytest

from service.retune import PastAlert, ProposedAlert
from service.retune_risk import (
    MIN_HISTORY_DAYS,
    ConfirmationMissing,
    RetuneRisk,
    check_confirmation,
    missed_confirmed_faults,
)


def proposed(start: int, end: int) -> ProposedAlert:
    return ProposedAlert(start_ms=start, end_ms=end, severity="warning", peak=5.0, peak_at_ms=start, returned=True)


def test_a_confirmed_fault_is_missed_only_when_no_proposed_alert_meets_it() -> None:
    past = [PastAlert(1, 100, 200, "confirmed_fault"), PastAlert(2, 300, 400, "confirmed_fault"), PastAlert(3, 500, 600, "false_alarm")]
    # Closed intervals: touching at one end counts as meeting.
    assert [p.alert_id for p in missed_confirmed_faults([proposed(200, 250)], past)] == [2]
    assert [p.alert_id for p in missed_confirmed_faults([], past)] == [1, 2]  # a false alarm is never "missed"
    assert missed_confirmed_faults([proposed(0, 1000)], past) == []


def risk(missed: tuple[int, ...] = (), days: float = 30.0, factor: float = 1.0) -> RetuneRisk:
    return RetuneRisk(tuple(PastAlert(i, 0, 1, "confirmed_fault") for i in missed), len(missed), days, factor)


def test_what_needs_confirming_and_what_is_called_out() -> None:
    assert risk().needs_confirmation == [] and not risk().big_change
    assert risk(missed=(7,)).needs_confirmation == ["missed_confirmed_faults"]
    assert risk(days=MIN_HISTORY_DAYS - 0.01).needs_confirmation == ["short_history"]
    assert risk(days=MIN_HISTORY_DAYS).needs_confirmation == []
    assert risk(factor=3.01).big_change and risk(factor=0.33).big_change and not risk(factor=3.0).big_change
    assert "366x the level in force" in risk(factor=366.0).change_note()
    assert "The one confirmed fault" in risk(missed=(7,)).statements()[0] and "#7" in risk(missed=(7,)).statements()[0]


@pytest.mark.parametrize(
    ("confirm_missed", "short", "reason", "field"),
    [
        ([], True, "a reason long enough here", "confirm_missed"),
        ([8], True, "a reason long enough here", "confirm_missed"),
        ([7], False, "a reason long enough here", "confirm_short_history"),
        ([7], True, "too short", "reason"),
    ],
)
def test_a_risky_change_without_its_confirmation_names_the_field(confirm_missed, short, reason, field) -> None:
    with pytest.raises(ConfirmationMissing) as e:
        check_confirmation(risk(missed=(7,), days=1.0), confirm_missed=confirm_missed, confirm_short_history=short, reason=reason)
    assert e.value.field == field


def test_a_confirmed_or_harmless_change_passes() -> None:
    check_confirmation(risk(missed=(7,), days=1.0), confirm_missed=[7], confirm_short_history=True, reason="agreed with the shift lead")
    check_confirmation(risk(), confirm_missed=[], confirm_short_history=False, reason="ok")  # no risk: any reason the API accepts
