"""API key administration (admin): list, revoke, rotate; every change is audited.

A revoked key gets 401 on its next API request and its dashboard sessions end at once
(service/db/keys.revoke_key ends them in the same transaction). Rotating makes a new key
with the same name, role and assets and revokes the old one; the new key is shown once,
in the answer. Keys are created with `kilter keys create` (it prints the key alone).
"""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Path
from sqlalchemy.orm import Session

from service.api.deps import AdminCaller, DbSession, WriteSession
from service.api.schemas_keys import KeyList, KeyOut, RotatedKey
from service.db import keys as q
from service.db.models import ApiKey
from service.errors import Conflict, NotFound

router = APIRouter(prefix="/v1/keys", tags=["keys"])


def key_out(row: ApiKey) -> KeyOut:
    return KeyOut(id=row.id, name=row.name, role=row.role, assets=row.assets, prefix=row.prefix,
                  created_at=row.created_at, revoked_at=row.revoked_at)


KeyId = Annotated[int, Path(ge=1, le=2**63 - 1, description="key id, as GET /v1/keys lists it")]


def _live(session: Session, key_id: int) -> ApiKey:
    row = q.get_key(session, key_id=key_id, for_update=True)
    if row is None:
        raise NotFound(f"no API key #{key_id}; GET /v1/keys lists them", field="path.key_id")
    if row.revoked_at is not None:
        raise Conflict(f"API key #{key_id} ({row.name}) was already revoked at {row.revoked_at.isoformat()}", field="path.key_id")
    return row


@router.get("", response_model=KeyList)
def list_keys(session: DbSession, _caller: AdminCaller) -> KeyList:
    return KeyList(items=[key_out(r) for r in q.list_keys(session)])


@router.post("/{key_id}/revoke", response_model=KeyOut)
def revoke_key(key_id: KeyId, session: WriteSession, caller: AdminCaller) -> KeyOut:
    _live(session, key_id)
    q.revoke_key(session, key_id=key_id, actor=caller.name)
    session.commit()
    row = q.get_key(session, key_id=key_id)
    assert row is not None
    return key_out(row)


@router.post("/{key_id}/rotate", response_model=RotatedKey)
def rotate_key(key_id: KeyId, session: WriteSession, caller: AdminCaller) -> RotatedKey:
    _live(session, key_id)
    rotated = q.rotate_key(session, key_id=key_id, actor=caller.name)
    assert rotated is not None
    key, new = rotated
    session.commit()
    old = q.get_key(session, key_id=key_id)
    assert old is not None
    return RotatedKey(key=key, item=key_out(new), replaces=key_out(old))
