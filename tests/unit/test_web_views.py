"""Dashboard wording helpers: UTC times, durations, rates and form values."""

from __future__ import annotations

from datetime import datetime, timedelta, timezone

import pytest

from service.web import views

T = datetime(2026, 3, 2, 6, 5, 59, tzinfo=timezone.utc)


@pytest.mark.parametrize(
    "seconds,text",
    [(0, "0 s"), (59.4, "59 s"), (60, "1 min"), (3599, "59 min"), (3600, "1 h 00 min"), (3 * 3600 + 5 * 60, "3 h 05 min"), (2 * 86400 + 4 * 3600 + 59, "2 d 4 h"), (None, "–")],
)
def test_fmt_duration(seconds: float | None, text: str) -> None:
    assert views.fmt_duration(seconds) == text


def test_times_are_shown_in_utc_whatever_zone_they_carry() -> None:
    plus_two = T.astimezone(timezone(timedelta(hours=2)))
    assert views.fmt_time(plus_two) == "2026-03-02 06:05"
    assert views.fmt_ms(int(T.timestamp() * 1000)) == "2026-03-02 06:05"
    assert views.fmt_ago(T - timedelta(minutes=12), T) == "12 min ago"


def test_datetime_local_values_read_as_utc_and_round_trip() -> None:
    parsed = views.parse_utc_local("2026-03-02T06:05", "Opened from")
    assert parsed == datetime(2026, 3, 2, 6, 5, tzinfo=timezone.utc)
    assert views.to_utc_local(parsed) == "2026-03-02T06:05"
    assert views.parse_utc_local("  ", "Opened from") is None
    with pytest.raises(views.FormValueError, match=r"^Opened from: 'last tuesday' is not a date"):
        views.parse_utc_local("last tuesday", "Opened from")


@pytest.mark.parametrize("text", ["abc", "0", "-2", "nan", "inf"])
def test_positive_numbers_refuse_what_a_threshold_cannot_be(text: str) -> None:
    with pytest.raises(views.FormValueError, match="^Warning level: "):
        views.parse_positive(text, "Warning level", required=True)


def test_positive_numbers_blank_and_valid() -> None:
    assert views.parse_positive(" 1.5 ", "Warning level", required=True) == 1.5
    assert views.parse_positive("", "Critical level", required=False) is None
    with pytest.raises(views.FormValueError, match="enter a number above 0"):
        views.parse_positive("", "Warning level", required=True)


def test_rates_read_per_week_and_per_month() -> None:
    assert views.fmt_rate(None) == "not known"
    assert views.fmt_rate(0.0) == "0 a week"
    assert views.fmt_rate(0.25) == "0.25 a week (about 1.09 a month)"  # 0.25 x 30.44 / 7
    assert views.fmt_rate(3.0) == "3 a week"
    # No exponents for people: a rate from an extreme level, huge and tiny scores.
    assert views.fmt_rate(1.69e-42) == "< 0.01 a week (fewer than one in two years)"
    assert views.fmt_rate_short(1.69e-42) == "< 0.01" and views.fmt_rate_short(0.0) == "0"
    assert views.fmt_score(8234.4) == "8234" and views.fmt_score(82344.0) == "82,300" and views.fmt_score(1.234e7) == "12,300,000" and views.fmt_score(528.0) == "528"
    assert views.fmt_score(3e-9) == "< 0.001" and views.fmt_score(0.0123) == "0.0123"


def test_shelving_is_limited_to_thirty_days() -> None:
    assert views.shelve_until("8", T) == T + timedelta(hours=8)
    with pytest.raises(views.FormValueError, match="720"):
        views.shelve_until("721", T)
