"""Alert outcomes -> the trainer's events file (service/export_data.py's table)."""

from __future__ import annotations

from datetime import datetime, timedelta, timezone

from service.db.models import Alert
from service.export_data import event_rows
from service.grid import iso_ms

T0 = datetime(2026, 10, 14, 6, 0, tzinfo=timezone.utc)


def _alert(i: int, outcome: str | None, returned: bool = True) -> Alert:
    opened = T0 + timedelta(hours=10 * i)
    return Alert(
        id=i, asset_id="pump-01", severity="warning", opened_at=opened, last_seen_at=opened + timedelta(hours=2),
        returned_at=opened + timedelta(hours=3) if returned else None, outcome=outcome, close_note="seal\nweeping" if i == 1 else None,
        model_id="m", model_version="1", peak_score=1.0, peak_at=opened, top_channels=[],
    )  # fmt: skip


def test_outcomes_map_to_exclusions_and_false_alarms_stay_normal() -> None:
    alerts = [_alert(1, "confirmed_fault"), _alert(2, "false_alarm"), _alert(3, "planned_work"), _alert(4, "unknown"), _alert(5, None, returned=False)]
    rows, kept = event_rows(alerts, {"m": 7200.0})
    assert kept == 1
    assert [(r.kind, r.note) for r in rows] == [
        ("confirmed_fault", "alert #1 (warning): seal weeping"),
        ("maintenance", "alert #3 (warning)"),
        ("unreviewed", "alert #4 (warning)"),
        ("unreviewed", "alert #5 (warning)"),
    ]
    first, last = rows[0], rows[-1]
    # Starts the model's lead (window span + on-delay) before the opening, ends at the return
    # (or the last window seen while it has not returned).
    assert iso_ms(first.start_ms) == "2026-10-14T14:00:00Z" and iso_ms(first.end_ms) == "2026-10-14T19:00:00Z"
    assert iso_ms(last.end_ms) == "2026-10-16T10:00:00Z"
    assert iso_ms(1_790_000_000_123) == "2026-09-21T14:13:20.123Z"
