"""Liveness, readiness (models loaded and database reachable) and Prometheus metrics; no key needed."""

from __future__ import annotations

import logging
from typing import Any

from fastapi import APIRouter, Request, Response
from fastapi.responses import JSONResponse, PlainTextResponse

from service.errors import KilterError
from service.metrics import CONTENT_TYPE

log = logging.getLogger("kilter")

router = APIRouter(tags=["health"])


@router.get("/healthz")
def healthz() -> dict[str, str]:
    return {"status": "ok"}


@router.get("/readyz")
def readyz(request: Request) -> JSONResponse:
    checks: dict[str, Any] = {}
    ok = True
    registry = getattr(request.app.state, "registry", None)
    db = getattr(request.app.state, "db", None)
    if registry is not None and registry.loaded:
        try:
            if db is not None:
                registry.sync(db)  # the versions the cluster serves, or not ready if this replica cannot load them
            checks["models"] = {m.model_id: m.version for m in registry.models()}
        except KilterError as e:
            ok, checks["models"] = False, e.message
        except Exception as e:  # the database check below says more
            checks["models"] = {m.model_id: m.version for m in registry.models()}
            log.debug("readiness: registry check failed: %s", e)
    else:
        ok, checks["models"] = False, "not loaded"
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
