"""Queries of `kilter export`: the stored readings of some assets in time order, read in
bounded pages, and the alerts over the same stretch (service/export_data.py writes them)."""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from datetime import datetime
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from service.db.models import Alert, Asset, Reading

PAGE = 5000  # readings per query: memory stays bounded whatever the history's length


def asset_ids(session: Session, *, only: Sequence[str] | None = None) -> list[str]:
    """Assets the service knows, in id order (restricted to `only` when given)."""
    q = select(Asset.asset_id).order_by(Asset.asset_id)
    if only is not None:
        q = q.where(Asset.asset_id.in_(list(only)))
    return [str(a) for a in session.scalars(q)]


def asset_models(session: Session, *, assets: Sequence[str]) -> dict[str, str]:
    """asset -> the model id it is bound to."""
    rows = session.execute(select(Asset.asset_id, Asset.model_id).where(Asset.asset_id.in_(list(assets))))
    return {str(a): str(m) for a, m in rows}


def readings(
    session: Session, *, asset_id: str, since_ms: int | None = None, until_ms: int | None = None, page: int = PAGE
) -> Iterator[tuple[int, dict[str, Any]]]:
    """(ts_ms, values) of one asset in time order, [since_ms, until_ms), a page at a time (keyset)."""
    last = None
    while True:
        q = select(Reading.ts_ms, Reading.values).where(Reading.asset_id == asset_id)
        if last is not None:
            q = q.where(Reading.ts_ms > last)
        elif since_ms is not None:
            q = q.where(Reading.ts_ms >= since_ms)
        if until_ms is not None:
            q = q.where(Reading.ts_ms < until_ms)
        rows = session.execute(q.order_by(Reading.ts_ms).limit(page)).all()
        for ts, values in rows:
            yield int(ts), values
        if len(rows) < page:
            return
        last = int(rows[-1][0])


def alerts_between(
    session: Session, *, assets: Sequence[str], since: datetime | None = None, until: datetime | None = None
) -> list[Alert]:
    """Alerts of `assets` that overlap [since, until), closed or not, oldest first."""
    q = select(Alert).where(Alert.asset_id.in_(list(assets)))
    if until is not None:
        q = q.where(Alert.opened_at < until)
    rows = list(session.scalars(q.order_by(Alert.opened_at, Alert.id)))
    if since is not None:
        rows = [a for a in rows if (a.returned_at or a.last_seen_at) >= since]
    return rows
