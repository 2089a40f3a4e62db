"""The ONE place that maps errors to HTTP responses.

Domain errors (service/errors.py) get their status from `HTTP_STATUS` (the nearest base
class listed wins); every error body is `{"error": {"code", "message", "field"?,
"details"?}}`. Pydantic's request validation errors become the same shape with the field
path written as `body.readings[3].ts`. Library errors are converted here too: ONNX
Runtime's (ScoringError, 503) and the database's (service.errors.database_error: busy ->
503 `database_busy` with Retry-After: 1, unreachable -> 503 with Retry-After: 5).
"""

from __future__ import annotations

import logging
import sqlite3
from collections.abc import Sequence
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from sqlalchemy.exc import OperationalError
from starlette.exceptions import HTTPException as StarletteHTTPException

from service.errors import (
    BadInput,
    Conflict,
    Forbidden,
    KilterError,
    ModelError,
    NotFound,
    TooLarge,
    Unauthorized,
    UnsupportedMediaType,
    Unavailable,
    database_error,
    is_busy,
)
from service.scoring import ScoringError

log = logging.getLogger("kilter")

HTTP_STATUS: dict[type[KilterError], int] = {
    BadInput: 422,
    NotFound: 404,
    Conflict: 409,
    TooLarge: 413,
    Unauthorized: 401,
    Forbidden: 403,
    Unavailable: 503,
    ModelError: 409,
    UnsupportedMediaType: 415,
}


def http_status(exc: KilterError) -> int:
    """The HTTP status of a domain error: its nearest class in HTTP_STATUS, else 500."""
    for cls in type(exc).__mro__:
        if cls in HTTP_STATUS:
            return HTTP_STATUS[cls]  # type: ignore[index]
    return 500


def field_path(loc: Sequence[str | int]) -> str:
    """('body', 'readings', 3, 'ts') -> 'body.readings[3].ts'."""
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += ("." if out else "") + str(part)
    return out


_HINTS = {
    "finite_number": "NaN and infinity are refused; send null for a value that was not measured",
    "float_type": "send a JSON number, or null for a value that was not measured",
    "extra_forbidden": "this field is not part of the request",
}


def _plain(error: dict[str, Any]) -> str:
    """Pydantic's message with a hint of what would be accepted."""
    msg = str(error.get("msg", "invalid value"))
    hint = _HINTS.get(str(error.get("type", "")))
    return f"{msg} ({hint})" if hint else msg


def _headers(status: int, retry_after_s: int | None = None) -> dict[str, str] | None:
    headers: dict[str, str] = {}
    if status == 401:
        headers["WWW-Authenticate"] = "Bearer"
    if retry_after_s is not None:
        headers["Retry-After"] = str(int(retry_after_s))
    return headers or None


def error_response(status: int, code: str, message: str, field: str | None = None, **extra: Any) -> JSONResponse:
    err: dict[str, Any] = {"code": code, "message": message}
    if field is not None:
        err["field"] = field
    err.update(extra)
    return JSONResponse({"error": err}, status_code=status, headers=_headers(status))


def domain_response(exc: KilterError) -> JSONResponse:
    status = http_status(exc)
    retry = exc.retry_after_s if isinstance(exc, Unavailable) else None
    return JSONResponse(exc.body(), status_code=status, headers=_headers(status, retry))


def install_error_handlers(app: FastAPI) -> None:
    @app.exception_handler(KilterError)
    async def _ours(_req: Request, exc: KilterError) -> JSONResponse:
        return domain_response(exc)

    @app.exception_handler(RequestValidationError)
    async def _validation(_req: Request, exc: RequestValidationError) -> JSONResponse:
        errors = exc.errors()
        first = errors[0] if errors else {"loc": (), "msg": "invalid request"}
        path = field_path(first.get("loc", ()))
        msg = _plain(first)
        more = [{"field": field_path(e.get("loc", ())), "message": str(e.get("msg", ""))} for e in errors[1:20]]
        message = f"{path}: {msg}" if path else msg
        extra = {"details": {"more": more}} if more else {}
        return error_response(422, "bad_input", message, path or None, **extra)

    @app.exception_handler(StarletteHTTPException)
    async def _http(_req: Request, exc: StarletteHTTPException) -> JSONResponse:
        codes = {401: "unauthorized", 403: "forbidden", 404: "not_found", 405: "method_not_allowed", 408: "request_timeout", 413: "too_large"}
        return error_response(exc.status_code, codes.get(exc.status_code, "http_error"), str(exc.detail))

    @app.exception_handler(ScoringError)
    async def _scoring(_req: Request, exc: ScoringError) -> JSONResponse:
        log.error("scoring failed: %s", exc)
        return error_response(503, "scoring_failed", f"the model could not score this request: {exc}")

    async def _db(_req: Request, exc: Exception) -> JSONResponse:
        log.warning("database %s: %s", "busy" if is_busy(exc) else "error", exc)
        return domain_response(database_error(exc))

    # psycopg raises serialization failures, deadlocks and lock/statement timeouts as
    # OperationalError subclasses, SQLite its busy/locked errors likewise. The driver's own
    # sqlite3.OperationalError arrives unwrapped when SQLite is busy at the BEGIN IMMEDIATE
    # that service/db/session.py issues on the driver connection itself.
    app.add_exception_handler(OperationalError, _db)
    app.add_exception_handler(sqlite3.OperationalError, _db)
