"""Failed authentications per client address, counted in the database so every worker and
replica sees the same count (service/api/ratelimit.py decides what to do with it)."""

from __future__ import annotations

from sqlalchemy import delete, func, select

from service.db.models import AuthFailure
from service.db.session import Database


def recent(db: Database, *, address: str, since_ms: int) -> tuple[int, int | None]:
    """(failures from `address` at or after `since_ms`, the oldest of them in epoch ms)."""
    with db.engine.connect() as conn:
        n, oldest = conn.execute(
            select(func.count(), func.min(AuthFailure.at_ms)).where(AuthFailure.address == address, AuthFailure.at_ms >= since_ms)
        ).one()
    return int(n), (int(oldest) if oldest is not None else None)


def record(db: Database, *, address: str, at_ms: int, forget_before_ms: int) -> None:
    """One failure; failures older than the window are dropped on the way, so the table holds
    at most the limit's worth of rows per address."""
    with db.transaction() as s:
        s.execute(delete(AuthFailure).where(AuthFailure.at_ms < forget_before_ms))
        s.add(AuthFailure(address=address[:64], at_ms=at_ms))
