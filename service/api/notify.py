"""Notification routes and the outbox (admin keys): add, list, turn on/off, send a test,
see and retry dead-lettered messages. Delivery itself is the background sender's
(service/notifier.py); a test message goes through the same outbox."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Path, Query

from service.api.deps import AdminCaller, DbSession, WriteSession
from service.api.schemas_notify import (
    EnabledIn,
    OutboxList,
    OutboxOut,
    RouteCreated,
    RouteIn,
    RouteList,
    RouteOut,
    outbox_out,
    route_out,
)
from service.db import outbox as q
from service.db.models import OUTBOX_STATES
from service.errors import BadInput

router = APIRouter(prefix="/v1/notify", tags=["notifications"])
RouteId = Annotated[int, Path(ge=1, description="route id")]


@router.get("/routes", response_model=RouteList)
def list_routes(db: DbSession, _caller: AdminCaller) -> RouteList:
    return RouteList(items=[route_out(r) for r in q.list_routes(db)])


@router.post("/routes", response_model=RouteCreated, status_code=201)
def add_route(body: RouteIn, db: WriteSession, caller: AdminCaller) -> RouteCreated:
    route, secret = q.add_route(
        db, name=body.name, channel=body.channel, target=body.target, actor=caller.name, asset_id=body.asset_id,
        min_severity=body.min_severity, events=body.events, secret=body.secret,
    )
    out = RouteCreated(**route_out(route).model_dump(), secret=secret)
    db.commit()
    return out


@router.put("/routes/{route_id}/enabled", response_model=RouteOut)
def set_enabled(route_id: RouteId, body: EnabledIn, db: WriteSession, caller: AdminCaller) -> RouteOut:
    out = route_out(q.set_enabled(db, route_id=route_id, enabled=body.enabled, actor=caller.name))
    db.commit()
    return out


@router.post("/routes/{route_id}/test", response_model=OutboxOut, status_code=202)
def send_test(route_id: RouteId, db: WriteSession, caller: AdminCaller) -> OutboxOut:
    """Queue a test message through this route; the sender delivers it within seconds."""
    out = outbox_out(q.queue_test(db, route_id=route_id, actor=caller.name))
    db.commit()
    return out


@router.get("/outbox", response_model=OutboxList)
def list_outbox(
    db: DbSession,
    _caller: AdminCaller,
    status: Annotated[str | None, Query(description="pending | sending | sent | dead")] = None,
    limit: Annotated[int, Query(ge=1, le=200)] = 50,
) -> OutboxList:
    if status is not None and status not in OUTBOX_STATES:
        raise BadInput(f"status must be one of {', '.join(OUTBOX_STATES)}, got {status!r}", field="query.status")
    return OutboxList(items=[outbox_out(r) for r in q.list_outbox(db, status=status, limit=limit)])


@router.post("/outbox/{message_id}/retry", response_model=OutboxOut)
def retry(message_id: Annotated[int, Path(ge=1)], db: WriteSession, caller: AdminCaller) -> OutboxOut:
    out = outbox_out(q.retry_dead(db, row_id=message_id, actor=caller.name))
    db.commit()
    return out
