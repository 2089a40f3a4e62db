"""Dashboard sessions and the cluster's session secret, in the database (issue 11), so any
worker or replica accepts a session another one issued, and ending one takes effect at once
everywhere.

The cookie (service/web/session.py) carries a random session id signed under the secret;
`web_sessions` holds the sha256 of that id with its key and expiry. A cookie is good only
while its row exists, has not ended (sign-out, key revocation) and has not expired, and its
key is not revoked. The secret is made once per database (`cluster_secret`), unless the
settings give one.
"""

from __future__ import annotations

import hashlib
import secrets
from datetime import datetime, timedelta, timezone

from sqlalchemy import Connection, delete, select, update
from sqlalchemy.exc import IntegrityError

from service.db.models import ApiKey, ClusterSecret, WebSessionRow
from service.db.session import Database

SESSION_SECRET = "session_secret"


def sid_hash(sid: str) -> str:
    return hashlib.sha256(sid.encode("utf-8")).hexdigest()


def cluster_secret(db: Database, name: str = SESSION_SECRET) -> str:
    """The named secret, made (64 hex characters, 256 random bits) by whichever process asks
    first; the primary key makes every other process read that one."""
    with db.engine.connect() as conn:
        value = conn.execute(select(ClusterSecret.value).where(ClusterSecret.name == name)).scalar()
    if value is not None:
        return str(value)
    try:
        with db.transaction() as s:
            s.add(ClusterSecret(name=name, value=secrets.token_hex(32)))
    except IntegrityError:
        pass  # another process made it first: use theirs
    with db.engine.connect() as conn:
        return str(conn.execute(select(ClusterSecret.value).where(ClusterSecret.name == name)).scalar_one())


def start(db: Database, *, sid: str, key_id: int, expires_at: datetime) -> None:
    """Record a new session; sessions expired a day or more ago are dropped on the way (an
    expired one is refused by its expiry already; the day keeps recent ones for inspection)."""
    with db.transaction() as s:
        s.execute(delete(WebSessionRow).where(WebSessionRow.expires_at < datetime.now(timezone.utc) - timedelta(days=1)))
        s.add(WebSessionRow(sid_hash=sid_hash(sid), key_id=key_id, expires_at=expires_at))


def holds(conn: Connection, *, sid: str, key_id: int, now: datetime | None = None) -> bool:
    """True while the session is recorded for this key, not ended, not expired, and its key not revoked."""
    now = now or datetime.now(timezone.utc)
    row = conn.execute(
        select(WebSessionRow.ended_at, WebSessionRow.expires_at, ApiKey.revoked_at)
        .join(ApiKey, ApiKey.id == WebSessionRow.key_id)
        .where(WebSessionRow.sid_hash == sid_hash(sid), WebSessionRow.key_id == key_id)
    ).first()
    if row is None:
        return False
    ended_at, expires_at, revoked_at = row
    return ended_at is None and revoked_at is None and expires_at > now


def end(db: Database, *, sid: str) -> None:
    """Sign-out: the session ends for every worker at once."""
    with db.transaction() as s:
        s.execute(update(WebSessionRow).where(WebSessionRow.sid_hash == sid_hash(sid), WebSessionRow.ended_at.is_(None))
                  .values(ended_at=datetime.now(timezone.utc)))


def end_for_key(session, *, key_id: int) -> int:  # noqa: ANN001 - an ORM Session in the caller's transaction
    """End every open session of a key (on revocation); how many were open."""
    result = session.execute(update(WebSessionRow).where(WebSessionRow.key_id == key_id, WebSessionRow.ended_at.is_(None))
                             .values(ended_at=datetime.now(timezone.utc)))
    return int(result.rowcount or 0)
