"""Formatting for the dashboard's pages: UTC times, durations, numbers, form values.

Pure functions (no database, no HTTP), so the pages and their tests agree on one wording.
"""

from __future__ import annotations

import math
from datetime import datetime, timedelta, timezone

from service.web.charts import format_number

OUTCOME_LABELS: dict[str, str] = {
    "confirmed_fault": "confirmed fault",
    "false_alarm": "false alarm",
    "planned_work": "planned work",
    "unknown": "unknown",
}
EVENT_LABELS: dict[str, str] = {
    "opened": "Opened by the rule",
    "escalated": "Escalated to critical",
    "returned": "Returned to normal",
    "acknowledged": "Acknowledged",
    "note": "Note",
    "closed": "Closed",
}


class FormValueError(ValueError):
    """A form field holds something the page cannot use; the message names the field."""


def fmt_time(t: datetime | None) -> str:
    """'2026-03-02 06:14' in UTC (pages say UTC in their headings), '–' for none."""
    if t is None:
        return "–"
    return t.astimezone(timezone.utc).strftime("%Y-%m-%d %H:%M")


def fmt_ms(t_ms: int | None) -> str:
    return fmt_time(datetime.fromtimestamp(t_ms / 1000, tz=timezone.utc)) if t_ms is not None else "–"


def fmt_duration(seconds: float | None) -> str:
    """Short human duration: '45 s', '12 min', '3 h 05 min', '2 d 4 h'."""
    if seconds is None or not math.isfinite(seconds):
        return "–"
    s = max(0, int(round(seconds)))
    if s < 60:
        return f"{s} s"
    m = s // 60
    if m < 60:
        return f"{m} min"
    h, m = divmod(m, 60)
    if h < 24:
        return f"{h} h {m:02d} min"
    d, h = divmod(h, 24)
    return f"{d} d {h} h"


def fmt_ago(t: datetime | None, now: datetime) -> str:
    if t is None:
        return ""
    delta = (now - t).total_seconds()
    if delta < 0:
        return "in the future"
    return f"{fmt_duration(delta)} ago"


def fmt_score(v: float | None) -> str:
    """A score or level for people: 3 significant digits, thousands grouped, never an exponent
    ('0.0123', '528', '8,230', '1,230,000'); below 0.001, '< 0.001'."""
    if v is None:
        return "–"
    if math.isfinite(v) and v != 0 and abs(v) < 1e-3:
        return "< 0.001" if v > 0 else "> -0.001"
    if math.isfinite(v) and abs(v) >= 1e4:
        return f"{round(v, 2 - int(math.floor(math.log10(abs(v))))):,.0f}"  # 3 significant digits
    return format_number(v)


RATE_FLOOR = 0.01  # per week: smaller rates read as "< 0.01" (once in two years or rarer)


def fmt_rate(per_week: float | None) -> str:
    """False alarms per week, with a per-month reading for small rates; never an exponent."""
    if per_week is None:
        return "not known"
    if per_week == 0:
        return "0 a week"
    if per_week < RATE_FLOOR:
        return "< 0.01 a week (fewer than one in two years)"
    if per_week < 1:
        return f"{fmt_score(per_week)} a week (about {fmt_score(per_week * 30.44 / 7)} a month)"
    return f"{fmt_score(per_week)} a week"


def fmt_rate_short(per_week: float | None) -> str:
    """The bare figure for a big number on the page: '0.25', '0', '< 0.01', 'n/a'."""
    if per_week is None:
        return "n/a"
    if 0 < per_week < RATE_FLOOR:
        return "< 0.01"
    return fmt_score(per_week)


def parse_utc_local(value: str | None, field: str) -> datetime | None:
    """A datetime-local form value ('2026-03-02T06:00') read as UTC; blank is None."""
    if value is None or not value.strip():
        return None
    text = value.strip()
    for fmt in ("%Y-%m-%dT%H:%M", "%Y-%m-%dT%H:%M:%S", "%Y-%m-%d"):
        try:
            return datetime.strptime(text, fmt).replace(tzinfo=timezone.utc)
        except ValueError:
            continue
    raise FormValueError(f"{field}: {text!r} is not a date and time; use the picker or type 2026-03-02T06:00 (UTC)")


def to_utc_local(t: datetime | None) -> str:
    """The datetime-local value of a UTC time (the inverse of parse_utc_local)."""
    return t.astimezone(timezone.utc).strftime("%Y-%m-%dT%H:%M") if t is not None else ""


def parse_positive(value: str | None, field: str, *, required: bool) -> float | None:
    """A positive finite number from a form field; blank is None unless required."""
    if value is None or not value.strip():
        if required:
            raise FormValueError(f"{field}: enter a number above 0")
        return None
    try:
        number = float(value.strip())
    except ValueError:
        raise FormValueError(f"{field}: {value.strip()!r} is not a number; enter a number above 0 such as 1.5") from None
    if not math.isfinite(number) or number <= 0:
        raise FormValueError(f"{field}: {value.strip()!r} must be a finite number above 0")
    return number


def shelve_until(hours_text: str | None, now: datetime) -> datetime:
    hours = parse_positive(hours_text, "hours", required=True)
    assert hours is not None
    if hours > 720:
        raise FormValueError(f"hours: {format_number(hours)} is more than 720 (30 days); shelve for less and renew later")
    return now + timedelta(hours=hours)
