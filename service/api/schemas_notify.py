"""Request and response models of the notification routes (admins)."""

from __future__ import annotations

from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field

from service.api.schemas_alerts import UtcOut

Channel = Literal["webhook", "email"]
EventName = Literal["opened", "escalated", "returned", "unacknowledged"]


class RouteIn(BaseModel):
    model_config = ConfigDict(extra="forbid")

    name: str = Field(min_length=1, max_length=64, description="unique; shown in the outbox and audit log")
    channel: Channel
    target: str = Field(min_length=3, max_length=2000, description="webhook URL, or comma-separated e-mail addresses")
    asset_id: str | None = Field(default=None, max_length=64, description="only this asset's alerts; default every asset")
    min_severity: Literal["warning", "critical"] = Field(default="warning", description="critical: critical alerts only")
    events: list[EventName] = Field(default=["opened", "escalated", "returned", "unacknowledged"], min_length=1)
    secret: str | None = Field(default=None, min_length=16, max_length=128, description="webhooks: signing secret; default made for you")


class RouteOut(BaseModel):
    id: int
    name: str
    channel: Channel
    target: str
    asset_id: str | None
    min_severity: str
    events: list[str]
    enabled: bool
    created_by: str
    created_at: UtcOut


class RouteCreated(RouteOut):
    secret: str | None = Field(description="webhooks: the signing secret, shown only in this answer")


class RouteList(BaseModel):
    items: list[RouteOut]
    next_cursor: str | None = None


class EnabledIn(BaseModel):
    model_config = ConfigDict(extra="forbid")

    enabled: bool


class OutboxOut(BaseModel):
    id: int
    idempotency_key: str
    route_id: int
    alert_id: int | None
    kind: str
    status: Literal["pending", "sending", "sent", "dead"]
    attempts: int
    next_attempt_at: UtcOut
    last_error: str | None
    created_at: UtcOut
    sent_at: UtcOut | None
    payload: dict[str, Any]


class OutboxList(BaseModel):
    items: list[OutboxOut]
    next_cursor: str | None = None


def route_out(route: Any) -> RouteOut:
    return RouteOut(
        id=route.id, name=route.name, channel=route.channel, target=route.target, asset_id=route.asset_id,
        min_severity=route.min_severity, events=list(route.events or []), enabled=bool(route.enabled),
        created_by=route.created_by, created_at=route.created_at,
    )


def outbox_out(row: Any) -> OutboxOut:
    return OutboxOut(
        id=row.id, idempotency_key=row.idempotency_key, route_id=row.route_id, alert_id=row.alert_id, kind=row.kind,
        status=row.status, attempts=row.attempts, next_attempt_at=row.next_attempt_at, last_error=row.last_error,
        created_at=row.created_at, sent_at=row.sent_at, payload=row.payload,
    )
