"""When a threshold change needs more than one click: the risks of a proposal, read from
its preview, and the confirmation that accepts them. Pure functions (no database, no
HTTP); the threshold endpoint and the dashboard's Apply both call them.

Rules (issue 14, numbers decided here and written in the README):
- A proposal that would have raised no alert for an alert people closed as a confirmed
  fault in the previewed stretch, or a preview over less than MIN_HISTORY_DAYS asset-days
  of stored windows, is applied only with an explicit confirmation that names each missed
  alert (by id) and the short history, and with a reason of at least MIN_RISKY_REASON
  characters. The change is flagged in the audit log with what was accepted.
- A warning level more than BIG_CHANGE_FACTOR times, or less than 1/BIG_CHANGE_FACTOR of,
  the level in force is called out beside the figures (not blocked: it may be right).
"""

from __future__ import annotations

from collections.abc import Collection, Sequence
from dataclasses import dataclass

from service.retune import PastAlert, Preview, ProposedAlert

MIN_HISTORY_DAYS = 7.0  # asset-days of stored windows a preview should cover (common practice: at least a week of cycles)
MIN_RISKY_REASON = 15  # characters: a sentence, not "ok"
BIG_CHANGE_FACTOR = 3.0


def missed_confirmed_faults(proposed: Sequence[ProposedAlert], past: Sequence[PastAlert]) -> list[PastAlert]:
    """Alerts closed as confirmed faults that no proposed alert meets (closed intervals)."""
    return [
        p
        for p in past
        if p.outcome == "confirmed_fault" and not any(a.start_ms <= p.end_ms and p.start_ms <= a.end_ms for a in proposed)
    ]


@dataclass(frozen=True)
class RetuneRisk:
    missed: tuple[PastAlert, ...]  # confirmed faults the proposal would not have alerted on
    confirmed_total: int  # confirmed faults in the previewed stretch
    history_days: float  # asset-days of stored windows the preview replayed
    warning_factor: float  # proposed warning / warning in force

    @property
    def short_history(self) -> bool:
        return self.history_days < MIN_HISTORY_DAYS

    @property
    def big_change(self) -> bool:
        return self.warning_factor > BIG_CHANGE_FACTOR or self.warning_factor < 1 / BIG_CHANGE_FACTOR

    @property
    def needs_confirmation(self) -> list[str]:
        """What the confirmation must name: 'missed_confirmed_faults', 'short_history'."""
        return [name for name, on in (("missed_confirmed_faults", bool(self.missed)), ("short_history", self.short_history)) if on]

    @property
    def missed_ids(self) -> list[int]:
        return [p.alert_id for p in self.missed]

    def statements(self) -> list[str]:
        """One plain sentence per risk, for the page and the error message."""
        out = []
        if self.missed:
            ids = ", ".join(f"#{i}" for i in self.missed_ids)
            if self.confirmed_total == 1:
                which = "The one confirmed fault"
            elif len(self.missed) == self.confirmed_total:
                which = f"All {self.confirmed_total} confirmed faults"
            else:
                which = f"{len(self.missed)} of the {self.confirmed_total} confirmed faults"
            out.append(
                f"{which} in this stretch would have raised no alert at these levels "
                f"(alert{'s' if len(self.missed) != 1 else ''} {ids})."
            )
        if self.short_history:
            out.append(
                f"The preview covers {fmt_days(self.history_days)} of stored scores, less than the {fmt_days(MIN_HISTORY_DAYS)} "
                "a change should be judged on."
            )
        return out

    def change_note(self) -> str:
        """The size of the change, called out when it is large."""
        if not self.big_change:
            return ""
        if self.warning_factor >= 1:
            return f"The warning level would be {fmt_factor(self.warning_factor)} the level in force: far fewer alerts would open."
        return f"The warning level would be {fmt_factor(1 / self.warning_factor)} below the level in force: many more alerts may open."

    def audit(self) -> dict[str, object]:
        """What the audit log keeps about an accepted risk."""
        return {
            "flagged": bool(self.needs_confirmation),
            "accepted_risks": self.needs_confirmation,
            "missed_confirmed_faults": self.missed_ids,
            "history_days": round(self.history_days, 3),
            "warning_factor": round(self.warning_factor, 4),
        }


def assess(preview: Preview, past: Sequence[PastAlert], *, current_warning: float, window_period_s: float) -> RetuneRisk:
    """The risks of a previewed proposal against the rule in force."""
    return RetuneRisk(
        missed=tuple(missed_confirmed_faults(preview.proposed, past)),
        confirmed_total=sum(1 for p in past if p.outcome == "confirmed_fault"),
        history_days=preview.windows * window_period_s / 86400.0,
        warning_factor=preview.rule.warning / current_warning if current_warning > 0 else 1.0,
    )


class ConfirmationMissing(ValueError):
    """The change needs a confirmation it did not carry; the message says what to name."""

    def __init__(self, message: str, field: str) -> None:
        super().__init__(message)
        self.field = field


def check_confirmation(risk: RetuneRisk, *, confirm_missed: Collection[int], confirm_short_history: bool, reason: str) -> None:
    """Pass when every risk is named by the confirmation and the reason is long enough;
    ConfirmationMissing naming the field and the risk otherwise."""
    if not risk.needs_confirmation:
        return
    unnamed = [i for i in risk.missed_ids if i not in set(confirm_missed)]
    if unnamed:
        raise ConfirmationMissing(
            " ".join(risk.statements()) + f" To apply it anyway, confirm each missed alert by id: {unnamed}.", "confirm_missed"
        )
    if risk.short_history and not confirm_short_history:
        raise ConfirmationMissing(" ".join(risk.statements()) + " To apply it anyway, confirm the short history.", "confirm_short_history")
    if len(reason.strip()) < MIN_RISKY_REASON:
        raise ConfirmationMissing(
            f"a change that {' and '.join(_risk_words(risk))} needs a reason of at least {MIN_RISKY_REASON} characters "
            f"saying why (got {len(reason.strip())})",
            "reason",
        )


def _risk_words(risk: RetuneRisk) -> list[str]:
    words = []
    if risk.missed:
        words.append("misses a confirmed fault")
    if risk.short_history:
        words.append("was previewed on little history")
    return words


def fmt_days(days: float) -> str:
    if days < 1:
        return f"{days * 24:.1f} asset-hours" if days > 0 else "no asset-days"
    return f"{days:.1f} asset-days" if days < 10 else f"{days:.0f} asset-days"


def fmt_factor(f: float) -> str:
    return f"{f:.1f}x" if f < 10 else f"{f:,.0f}x"
