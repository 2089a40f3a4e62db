"""Request and response models of the key administration endpoints (service/api/keys.py)."""

from __future__ import annotations

from pydantic import BaseModel, Field

from service.api.schemas import UtcOut


class KeyOut(BaseModel):
    id: int
    name: str
    role: str
    assets: list[str] | None = Field(description="machine keys limited to these assets; null = every asset")
    prefix: str = Field(description="the key's first characters, to recognise it; the key itself is never stored")
    created_at: UtcOut
    revoked_at: UtcOut | None


class KeyList(BaseModel):
    items: list[KeyOut]
    next_cursor: str | None = None


class RotatedKey(BaseModel):
    key: str = Field(description="the new key, shown only in this answer")
    item: KeyOut
    replaces: KeyOut
