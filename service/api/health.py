"""Liveness, readiness (models loaded and database reachable) and Prometheus metrics; no key needed."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Request, Response
from fastapi.responses import JSONResponse, PlainTextResponse

from service.metrics import CONTENT_TYPE

router = APIRouter(tags=["health"])


@router.get("/healthz")
def healthz() -> dict[str, str]:
    return {"status": "ok"}


@router.get("/readyz")
def readyz(request: Request) -> JSONResponse:
    checks: dict[str, Any] = {}
    ok = True
    registry = getattr(request.app.state, "registry", None)
    if registry is not None and registry.loaded:
        checks["models"] = {m.model_id: m.version for m in registry.models()}
    else:
        ok, checks["models"] = False, "not loaded"
    db = getattr(request.app.state, "db", None)
    try:
        if db is None:
            raise RuntimeError("not opened")
        db.ping()
        checks["database"] = "ok"
    except Exception as e:
        ok, checks["database"] = False, f"unreachable: {e}"
    return JSONResponse({"status": "ready" if ok else "not ready", "checks": checks}, status_code=200 if ok else 503)


@router.get("/metrics", response_class=PlainTextResponse)  # documented as text/plain (Prometheus text format), not JSON
def metrics(request: Request) -> Response:
    return Response(request.app.state.metrics.render(), media_type=CONTENT_TYPE)
