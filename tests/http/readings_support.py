"""Readings for the tiny model (tests/http/tiny_model.py): values `dev` scales away from
its centre score dev^2 per deviating channel share, so tests can steer scores."""

from __future__ import annotations

from typing import Any

import tiny_model

PERIOD_S = 60
T0 = 1790812800  # 2026-10-01T00:00:00Z, a multiple of the tiny model's window period (120 s)
TABLES = ("assets", "readings", "window_scores", "skipped_windows", "alerts", "alert_events", "threshold_versions")


def reading(i: int, dev: float = 0.0, *, channel: str | None = None, t0: int = T0, jitter_s: int = 3) -> dict[str, Any]:
    """The reading on grid step `i` after t0: every channel (or just `channel`) `dev` scales from the centre."""
    values = {}
    for name, centre, scale in zip(tiny_model.CHANNELS, tiny_model.CENTER, tiny_model.SCALE):
        shift = dev if channel is None or channel == name else 0.0
        values[name] = centre + shift * scale
    return {"ts": t0 + PERIOD_S * i + jitter_s, "values": values}


def readings(steps: range | list[int], dev: float = 0.0, **kw: Any) -> list[dict[str, Any]]:
    return [reading(i, dev, **kw) for i in steps]


def counts(env: Any) -> dict[str, int]:
    return {t: env.count(t) for t in TABLES}
