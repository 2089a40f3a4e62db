"""Read-only queries only the dashboard needs (everything else comes from service/db/).

Keyword-only and typed like the service's own query functions, so one can move into
service/db/ unchanged when the API needs it too.
"""

from __future__ import annotations

from sqlalchemy.orm import Session

from service.db.models import ApiKey


def key_by_id(session: Session, *, key_id: int) -> ApiKey | None:
    """The unrevoked key with this id, or None (a signed-in session names its key by id)."""
    row = session.get(ApiKey, key_id)
    if row is None or row.revoked_at is not None:
        return None
    return row
