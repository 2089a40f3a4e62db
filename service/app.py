"""`create_app(settings)`: the FastAPI application, with a lifespan that opens the
database (upgrading a new one), loads and validates the models, and runs retention
pruning and the notification sender (service/notifier.py) in the background. Nothing is created at import time.

Routers are included from the modules that exist, so the halves of the service can land
independently: readings and health (core), alerts, thresholds and models (alerts work),
and the dashboard (service.web.routes, static files at /static).
"""

from __future__ import annotations

import asyncio
import contextlib
import gc
import importlib
import logging
import time
from collections.abc import AsyncIterator
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import Any

import anyio.to_thread
from fastapi import FastAPI
from fastapi.staticfiles import StaticFiles
from starlette.exceptions import HTTPException as StarletteHTTPException

from service.db.migrate import current_revision, head_revision, upgrade
from service.db.session import Database
from service.api.errors import error_response, install_error_handlers
from service.metrics import Metrics
from service.models_registry import ModelRegistry
from service.api.docs import install_docs
from service.background import in_thread_to_completion
from service.settings import Settings

log = logging.getLogger("kilter")

API_ROUTER_MODULES = (
    "service.api.readings",
    "service.api.health",
    "service.api.alerts",
    "service.api.thresholds",
    "service.api.models",
    "service.api.keys",
    "service.api.notify",
)
WEB_ROUTER_MODULE = "service.web.routes"
STATIC_DIR = Path(__file__).parent / "web" / "static"


class StartupError(RuntimeError):
    """The service cannot start (bad model, database behind the code); the message says why."""


def open_database(settings: Settings) -> Database:
    """Open the database and make sure its schema is current (upgrading it if allowed)."""
    db = Database(settings.database_url, busy_timeout_ms=settings.db_busy_timeout_ms)
    try:
        if settings.auto_upgrade:
            upgrade(db.engine)
        else:
            have, want = current_revision(db.engine), head_revision()
            if have != want:
                raise StartupError(
                    f"database schema is at {have or 'nothing'}, this code needs {want}: run `kilter db upgrade`"
                )
    except Exception:
        db.dispose()
        raise
    return db


def load_registry(settings: Settings) -> ModelRegistry:
    registry = ModelRegistry(
        settings.model_dir,
        threads=settings.onnx_threads,
        chunk_size=settings.onnx_chunk,
        default_model=settings.default_model,
        asset_models=settings.asset_models,
    )
    registry.load()
    return registry


async def _retention_loop(app: FastAPI) -> None:
    from service.db.readings import prune

    settings: Settings = app.state.settings
    while True:
        cutoff = datetime.now(timezone.utc) - timedelta(days=settings.retention_days)
        try:
            removed = await in_thread_to_completion(_prune_once, app.state.db, cutoff, prune)
        except Exception as e:  # keep serving; the next round retries
            log.warning("retention pruning failed: %s", e)
        else:
            for table, n in removed.items():
                if n:
                    app.state.metrics.pruned_rows.inc(n, table=table)
        await asyncio.sleep(settings.retention_interval_s)


async def _sender_loop(app: FastAPI) -> None:
    from service.notifier import sender_loop  # notifications (service/notifier.py): its own shutdown waits

    await sender_loop(app)


def _prune_once(db: Database, cutoff: datetime, prune: Any) -> dict[str, int]:
    with db.transaction() as session:
        return prune(session, before=cutoff)


async def _warm_up(app: FastAPI, db: Database) -> None:
    """Pay once, before the service reports ready, what the first requests would otherwise
    pay: the thread pool's first use (anyio imports its backend then), a pooled database
    connection, and each included router's per-route state (FastAPI builds it lazily on the
    first request that walks the router). Then move every object start-up made (modules,
    models, the app) into the collector's permanent generation (gc.freeze), so the full
    collections that request garbage triggers no longer traverse them (measured:
    bench/ingest.py). The lifespan's end unfreezes them, so an app that is shut down (tests
    make many) can still be collected."""
    await anyio.to_thread.run_sync(db.ping)
    for route in app.routes:
        if hasattr(route, "effective_route_contexts"):  # an included router (FastAPI >= 0.13x)
            for _ in route.effective_route_contexts():
                pass
    gc.freeze()


class _BodyRefused(StarletteHTTPException):
    """Raised from the guarded receive. An HTTPException, so FastAPI's body reading passes it
    on (it turns other errors into a 400) and the one error mapping answers it."""

    def __init__(self, status: int, code: str, message: str) -> None:
        super().__init__(status_code=status, detail=message)
        self.status, self.code, self.message = status, code, message


class BodyGuard:
    """413 for a request body over `max_bytes` and 408 for one that does not arrive within
    `timeout_s` of the request's start, enforced as the app reads it.

    The body is not read ahead of the app: a declared Content-Length over the cap is refused
    at once, and otherwise the bytes are counted as the route pulls them, so a request the
    app refuses first (a missing or wrong key: AuthFirst) is answered without its body ever
    being read. A chunked body over the cap is a 413 as well, whatever the parser would have
    made of a cut-off one."""

    def __init__(self, app: Any, max_bytes: int, timeout_s: float = 30.0) -> None:
        self.app, self.max_bytes, self.timeout_s = app, max_bytes, timeout_s

    async def __call__(self, scope: dict[str, Any], receive: Any, send: Any) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        too_large = f"request body over the {self.max_bytes}-byte limit: send smaller batches"
        for name, value in scope.get("headers", []):
            if name == b"content-length" and value.isdigit() and int(value) > self.max_bytes:
                await error_response(413, "too_large", too_large)(scope, receive, send)
                return
        deadline = time.monotonic() + self.timeout_s
        seen = 0
        done = False
        started = False

        async def guarded_receive() -> dict[str, Any]:
            nonlocal seen, done
            if done:
                return await receive()  # after the body: only the disconnect remains
            try:
                msg = await asyncio.wait_for(receive(), timeout=max(deadline - time.monotonic(), 0.001))
            except TimeoutError:
                raise _BodyRefused(408, "request_timeout", f"the request body did not arrive within {self.timeout_s:.0f} s") from None
            if msg["type"] == "http.request":
                seen += len(msg.get("body", b""))
                if seen > self.max_bytes:
                    raise _BodyRefused(413, "too_large", too_large)
                done = not msg.get("more_body", False)
            return msg

        async def watching_send(msg: dict[str, Any]) -> None:
            nonlocal started
            started = started or msg["type"] == "http.response.start"
            await send(msg)

        try:
            await self.app(scope, guarded_receive, watching_send)
        except _BodyRefused as e:
            if not started:
                await error_response(e.status, e.code, e.message)(scope, receive, send)


class AuthFirst:
    """Requests that carry a body are authenticated before any of it is read. An API request
    without a valid key gets its 401 at once (and the failed-authentication count sees it);
    the caller found is left in the request state, where service/api/deps.get_caller takes
    it. A dashboard post without a valid session reaches its route with an empty body, so
    the route answers as it does for any signed-out post while the body stays unread."""

    METHODS = frozenset({"POST", "PUT", "PATCH", "DELETE"})
    OPEN_POSTS = ("/signin",)  # the sign-in form has no session yet by nature

    def __init__(self, app: Any) -> None:
        self.app = app

    async def __call__(self, scope: dict[str, Any], receive: Any, send: Any) -> None:
        path = scope.get("path", "")
        if scope["type"] != "http" or scope.get("method") not in self.METHODS or path in self.OPEN_POSTS:
            await self.app(scope, receive, send)
            return
        from starlette.requests import Request

        if path.startswith("/v1/"):
            from service.api.deps import get_caller
            from service.errors import Unauthorized

            try:
                await anyio.to_thread.run_sync(get_caller, Request(scope))  # a database look-up: off the loop
            except Unauthorized as e:
                await error_response(401, e.code, e.message)(scope, receive, send)
                return
            await self.app(scope, receive, send)
            return
        web = _optional_module("service.web.access")
        if web is not None and await anyio.to_thread.run_sync(web.current_user, Request(scope)) is None:

            async def no_body() -> dict[str, Any]:
                return {"type": "http.request", "body": b"", "more_body": False}

            await self.app(scope, no_body, send)
            return
        await self.app(scope, receive, send)


HSTS = b"max-age=31536000"  # one year, the usual value (common practice); no includeSubDomains: other hosts are not ours to bind


class SecurityHeaders:
    """X-Content-Type-Options: nosniff on every answer, and Strict-Transport-Security when the
    request came over TLS (directly, or through a trusted proxy's X-Forwarded-Proto)."""

    def __init__(self, app: Any) -> None:
        self.app = app

    async def __call__(self, scope: dict[str, Any], receive: Any, send: Any) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        tls = scope.get("scheme") == "https"

        async def add_headers(msg: dict[str, Any]) -> None:
            if msg["type"] == "http.response.start":
                headers = [*msg.get("headers", []), (b"x-content-type-options", b"nosniff")]
                if tls:
                    headers.append((b"strict-transport-security", HSTS))
                msg = {**msg, "headers": headers}
            await send(msg)

        await self.app(scope, receive, add_headers)


class RequestMetrics:
    """Counts requests by method, route template and status, and times them."""

    def __init__(self, app: Any, metrics: Metrics) -> None:
        self.app, self.metrics = app, metrics

    async def __call__(self, scope: dict[str, Any], receive: Any, send: Any) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        t0 = time.perf_counter()
        status = {"code": 500}

        async def send_status(msg: dict[str, Any]) -> None:
            if msg["type"] == "http.response.start":
                status["code"] = msg["status"]
            await send(msg)

        try:
            await self.app(scope, receive, send_status)
        finally:
            route = scope.get("route")
            path = getattr(route, "path", None) or "unmatched"
            self.metrics.requests.inc(method=scope.get("method", ""), route=path, status=str(status["code"]))
            self.metrics.request_seconds.observe(time.perf_counter() - t0)


def _optional_module(name: str) -> Any | None:
    try:
        return importlib.import_module(name)
    except ModuleNotFoundError as e:
        if e.name is not None and (name == e.name or name.startswith(e.name + ".")):
            return None  # that part of the service has not landed
        raise


def _document_bodies(app: FastAPI, models: list[Any]) -> None:
    """Put the schemas of bodies that routes parse themselves into the OpenAPI components
    (their requestBody refers to them), once, when the document is first built."""
    from service.api.schemas import body_schemas

    default = app.openapi

    def openapi() -> dict[str, Any]:
        if app.openapi_schema is None:
            schema = default()
            schema.setdefault("components", {}).setdefault("schemas", {}).update(body_schemas(*models))
        return app.openapi_schema  # type: ignore[return-value]

    app.openapi = openapi  # type: ignore[method-assign]


def create_app(settings: Settings | None = None) -> FastAPI:
    settings = settings or Settings()
    metrics = Metrics()

    @contextlib.asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        db = open_database(settings)
        try:
            registry = load_registry(settings)
            # Serve the versions the database binds (the cluster's choice), not only what is on disk.
            await anyio.to_thread.run_sync(registry.attach, db)
            app.state.registry = registry
        except Exception:
            db.dispose()
            raise
        app.state.db = db
        app.state.started_at = datetime.now(timezone.utc)
        await _warm_up(app, db)
        task = asyncio.create_task(_retention_loop(app)) if settings.retention_days > 0 else None
        sender = asyncio.create_task(_sender_loop(app)) if settings.notify_enabled else None
        try:
            yield
        finally:
            for background in (task, sender):
                if background is not None:
                    background.cancel()
                    with contextlib.suppress(asyncio.CancelledError):
                        await background
            db.dispose()
            gc.unfreeze()

    app = FastAPI(
        title="kilter",
        version="1",
        summary="Scores equipment sensor readings against a learned normal and raises calibrated alerts. Advisory only.",
        lifespan=lifespan,
        docs_url=None,  # served from the package by service/api/docs.py (no CDN)
        redoc_url=None,
    )
    app.state.settings = settings
    app.state.metrics = metrics
    install_error_handlers(app)

    self_parsed: list[Any] = []
    for name in API_ROUTER_MODULES:
        module = _optional_module(name)
        if module is not None:
            app.include_router(module.router)
            self_parsed.extend(getattr(module, "SELF_PARSED_BODIES", ()))
    _document_bodies(app, self_parsed)
    install_docs(app)
    web = _optional_module(WEB_ROUTER_MODULE)
    if web is not None:
        app.include_router(web.router)
        if STATIC_DIR.is_dir():
            app.mount("/static", StaticFiles(directory=STATIC_DIR), name="static")

    app.add_middleware(AuthFirst)
    app.add_middleware(BodyGuard, max_bytes=settings.max_body_bytes, timeout_s=settings.body_timeout_s)
    from service.api.ratelimit import FailedAuthLimit

    app.add_middleware(FailedAuthLimit, max_failures=settings.auth_fail_limit, window_s=settings.auth_fail_window_s)
    app.add_middleware(RequestMetrics, metrics=metrics)
    app.add_middleware(SecurityHeaders)
    # Outermost: the client address (and scheme) from a trusted proxy's headers, else the peer's.
    from uvicorn.middleware.proxy_headers import ProxyHeadersMiddleware

    app.add_middleware(ProxyHeadersMiddleware, trusted_hosts=settings.trusted_proxy_list)
    return app


def app_from_env() -> FastAPI:
    """Factory for `uvicorn --factory` / `serve --workers N`: settings from the environment."""
    from service.settings import load_settings

    return create_app(load_settings())
