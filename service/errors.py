"""Our exception hierarchy, and the ONE place that maps errors to HTTP responses.

Every error body is `{"error": {"code", "message", "field"?, "details"?}}`. Pydantic's
request validation errors become the same shape with the field path written as
`body.readings[3].ts`. Library errors (SQL, ONNX Runtime) are converted here too.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from sqlalchemy.exc import OperationalError
from starlette.exceptions import HTTPException as StarletteHTTPException

from service.scoring import ScoringError

log = logging.getLogger("kilter")


class KilterError(Exception):
    """Base of our errors; `status` and `code` decide the HTTP response."""

    status: int = 500
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
    status, code = 422, "bad_input"


class NotFound(KilterError):
    status, code = 404, "not_found"


class Conflict(KilterError):
    status, code = 409, "conflict"


class TooLarge(KilterError):
    status, code = 413, "too_large"


class UnsupportedMediaType(KilterError):
    status, code = 415, "unsupported_media_type"


class Unauthorized(KilterError):
    status, code = 401, "unauthorized"


class Forbidden(KilterError):
    status, code = 403, "forbidden"


class Unavailable(KilterError):
    status, code = 503, "unavailable"


class ModelSwitched(Unavailable):
    """The cluster switched an asset's model while this process scored a batch with the old
    one; nothing was stored and sending the batch again is safe (issue 11)."""

    code = "model_switched"


class ModelError(KilterError):
    """A model folder failed validation (load, names/shapes, sha256, self test)."""

    status, code = 409, "model_invalid"


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


def error_response(status: int, code: str, message: str, field: str | None = None, **extra: Any) -> JSONResponse:
    err: dict[str, Any] = {"code": code, "message": message}
    if field is not None:
        err["field"] = field
    err.update(extra)
    headers = {"WWW-Authenticate": "Bearer"} if status == 401 else None
    return JSONResponse({"error": err}, status_code=status, headers=headers)


def install_error_handlers(app: FastAPI) -> None:
    @app.exception_handler(KilterError)
    async def _ours(_req: Request, exc: KilterError) -> JSONResponse:
        headers = {"WWW-Authenticate": "Bearer"} if exc.status == 401 else None
        return JSONResponse(exc.body(), status_code=exc.status, headers=headers)

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

    @app.exception_handler(OperationalError)
    async def _db(_req: Request, exc: OperationalError) -> JSONResponse:
        log.error("database error: %s", exc)
        return error_response(503, "database_unavailable", "the database is busy or unreachable; retry shortly")
