"""Our exception hierarchy: domain errors that say what went wrong, not how HTTP shows it.

Every layer (ingest, service/db, the dashboard's actions, the registry) raises these;
the HTTP status of each and the error body are decided in ONE place,
service/api/errors.py. A domain error carries a stable `code`, a plain `message` naming
what was wrong and what would be accepted, and optionally the `field` path
(`body.readings[3].ts`) and `details`.

Database errors are converted here too (`database_error`), so the mapping of a busy or
locked database to "retry shortly" has one home whatever raised it.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy.exc import DBAPIError


class KilterError(Exception):
    """Base of our errors; `code` names the kind for clients."""

    code: str = "internal_error"

    def __init__(self, message: str, *, field: str | None = None, details: dict[str, Any] | None = None) -> None:
        super().__init__(message)
        self.message = message
        self.field = field
        self.details = details

    def body(self) -> dict[str, Any]:
        err: dict[str, Any] = {"code": self.code, "message": self.message}
        if self.field is not None:
            err["field"] = self.field
        if self.details:
            err["details"] = self.details
        return {"error": err}


class BadInput(KilterError):
    code = "bad_input"


class NotFound(KilterError):
    code = "not_found"


class Conflict(KilterError):
    code = "conflict"


class TooLarge(KilterError):
    code = "too_large"


class UnsupportedMediaType(KilterError):
    code = "unsupported_media_type"


class Unauthorized(KilterError):
    code = "unauthorized"


class Forbidden(KilterError):
    code = "forbidden"


class Unavailable(KilterError):
    """Something the request needs is not there now; `retry_after_s` says when to retry."""

    code = "unavailable"
    retry_after_s: int | None = None

    def __init__(self, message: str, *, retry_after_s: int | None = None, **kw: Any) -> None:
        super().__init__(message, **kw)
        if retry_after_s is not None:
            self.retry_after_s = retry_after_s


class DatabaseBusy(Unavailable):
    """The database held a lock past our wait (SQLite busy timeout, PostgreSQL lock or
    statement timeout) or aborted the transaction to resolve a conflict (serialization
    failure, deadlock): nothing was stored, the same request can simply be sent again."""

    code = "database_busy"
    retry_after_s = 1


class DatabaseUnavailable(Unavailable):
    code = "database_unavailable"
    retry_after_s = 5


class ModelSwitched(Unavailable):
    """The cluster switched an asset's model while this process scored a batch with the old
    one; nothing was stored and sending the batch again is safe (issue 11)."""

    code = "model_switched"


class ModelError(KilterError):
    """A model folder failed validation (load, names/shapes, sha256, self test)."""

    code = "model_invalid"


# SQLSTATEs that mean "busy, try again" on PostgreSQL: lock_not_available (lock_timeout,
# NOWAIT), query_canceled (statement_timeout), serialization_failure, deadlock_detected.
PG_BUSY_SQLSTATES = frozenset({"55P03", "57014", "40001", "40P01"})
# SQLite's messages for SQLITE_BUSY / SQLITE_LOCKED.
SQLITE_BUSY_TEXT = ("database is locked", "database table is locked", "database is busy")


def is_busy(exc: BaseException) -> bool:
    """True for a driver error that means the database was busy (see DatabaseBusy)."""
    orig = exc.orig if isinstance(exc, DBAPIError) else exc
    if getattr(orig, "sqlstate", None) in PG_BUSY_SQLSTATES:
        return True
    text = str(orig).lower()
    return any(t in text for t in SQLITE_BUSY_TEXT)


def database_error(exc: BaseException) -> Unavailable:
    """The domain error for a database operational error: busy (retry in a second) or unreachable."""
    if is_busy(exc):
        return DatabaseBusy("the database is busy with other writes; nothing was stored, send the request again shortly")
    return DatabaseUnavailable("the database is unreachable or failing; retry shortly")
