"""API keys: created once (only the SHA-256 of the key is stored) and looked up by hash.

Keys are `ew_` + secrets.token_urlsafe(32) (256 random bits), so a plain SHA-256 is an
adequate stored form: there is nothing to brute-force from the hash.
"""

from __future__ import annotations

import hashlib
import hmac
import re
import secrets
from datetime import datetime, timezone
from functools import cache
from typing import Any, NamedTuple

from sqlalchemy import Connection, Select, bindparam, select
from sqlalchemy.orm import Session

from service.db.models import ROLES, ApiKey, AuditLog
from service.db.prepared import prepared
from service.db.web_sessions import end_for_key

# New keys start "kt_"; keys made before the rename ("ew_...") keep working: a key is found by its hash alone.
KEY_PREFIX = "kt_"
ASSET_ID_RE = re.compile(r"^[A-Za-z0-9_.\-]{1,64}$")


def hash_key(key: str) -> str:
    return hashlib.sha256(key.encode("utf-8")).hexdigest()


def create_key(
    session: Session, *, name: str, role: str, assets: list[str] | None = None, actor: str = "cli"
) -> tuple[str, ApiKey]:
    """Store a new key's hash and return (the key itself, its row). Raises ValueError on bad input."""
    if role not in ROLES:
        raise ValueError(f"role {role!r} is not one of {', '.join(ROLES)}")
    name = name.strip()
    if not (1 <= len(name) <= 64):
        raise ValueError("name must be 1 to 64 characters")
    if assets is not None:
        if role != "machine":
            raise ValueError("only machine keys can be limited to assets (--assets)")
        if not assets:
            raise ValueError("--assets needs at least one asset id")
        for a in assets:
            if not ASSET_ID_RE.match(a) or set(a) == {"."}:
                raise ValueError(f"asset id {a!r} is not 1-64 characters of A-Z a-z 0-9 _ . - (not dots only)")
    key = KEY_PREFIX + secrets.token_urlsafe(32)
    row = ApiKey(name=name, role=role, assets=sorted(set(assets)) if assets else None, key_hash=hash_key(key), prefix=key[:10])
    session.add(row)
    session.flush()
    session.add(AuditLog(actor=actor, action="key.create", target=f"api_key:{row.id}", details={"name": name, "role": role, "assets": row.assets, "prefix": row.prefix}))
    return key, row


@cache
def _by_hash() -> Select[Any]:
    # Built once and reused: every request with a key asks.
    return select(ApiKey).where(ApiKey.key_hash == bindparam("key_hash"))


def find_key(session: Session, *, key: str) -> ApiKey | None:
    """The unrevoked key row for this key, or None."""
    digest = hash_key(key)
    row = session.scalars(_by_hash(), {"key_hash": digest}).first()
    if row is None or row.revoked_at is not None:
        return None
    if not hmac.compare_digest(row.key_hash, digest):
        return None
    return row


class KeyFields(NamedTuple):
    id: int
    name: str
    role: str
    assets: list[str] | None
    key_hash: str
    revoked_at: datetime | None


def _fields_by_hash() -> Select[Any]:
    t = ApiKey.__table__
    return select(t.c.id, t.c.name, t.c.role, t.c.assets, t.c.key_hash, t.c.revoked_at).where(t.c.key_hash == bindparam("key_hash"))


def find_key_fields(conn: Connection, *, key: str) -> KeyFields | None:
    """What find_key answers, as plain fields (id, name, role, assets) read on a connection
    with one compiled statement: the per-request check of an API key needs no ORM session.
    None when unknown or revoked."""
    digest = hash_key(key)
    rows = prepared(conn.dialect, "api_key_by_hash", _fields_by_hash).rows(conn, {"key_hash": digest})
    if not rows:
        return None
    row = KeyFields(*rows[0])
    if row.revoked_at is not None or not hmac.compare_digest(row.key_hash, digest):
        return None
    return row


def revoke_key(session: Session, *, key_id: int, actor: str) -> bool:
    row = session.get(ApiKey, key_id)
    if row is None or row.revoked_at is not None:
        return False
    row.revoked_at = datetime.now(timezone.utc)
    ended = end_for_key(session, key_id=key_id)  # its dashboard sessions end with it, on every worker
    session.add(AuditLog(actor=actor, action="key.revoke", target=f"api_key:{key_id}", details={"name": row.name, "sessions_ended": ended}))
    return True


def list_keys(session: Session) -> list[ApiKey]:
    """Every key, revoked ones included, oldest first (only hashes are stored: no key is shown)."""
    return list(session.scalars(select(ApiKey).order_by(ApiKey.id)))


def get_key(session: Session, *, key_id: int, for_update: bool = False) -> ApiKey | None:
    return session.get(ApiKey, key_id, with_for_update=for_update)


def rotate_key(session: Session, *, key_id: int, actor: str) -> tuple[str, ApiKey] | None:
    """A new key with the old one's name, role and assets, and the old one revoked (its
    sessions ended), in the caller's transaction; None when the key is unknown or revoked."""
    old = session.get(ApiKey, key_id, with_for_update=True)
    if old is None or old.revoked_at is not None:
        return None
    key, row = create_key(session, name=old.name, role=old.role, assets=list(old.assets) if old.assets else None, actor=actor)
    revoke_key(session, key_id=key_id, actor=actor)
    session.add(AuditLog(actor=actor, action="key.rotate", target=f"api_key:{key_id}",
                         details={"name": old.name, "replaced_by": row.id, "prefix": row.prefix}))
    return key, row
