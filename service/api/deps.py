"""Dependencies as Annotated aliases: the database session, the calling key, role checks.

Roles: machine posts readings and scores; maintenance < operator < admin for people;
admin may also do machine actions. Machine keys may be limited to named assets.

The trivial dependencies (no I/O) are `async def` so FastAPI runs them on the event loop
instead of hopping to the thread pool for each (a measurable share of a request's time);
everything that touches the database (the key look-up, sessions) is a plain function and
runs in the pool: a database wait (a pool checkout, a lock) must never block the loop.

Use in a route:
    def route(db: DbSession, caller: Annotated[Caller, Depends(require_role("operator"))]): ...
or the ready-made aliases MachineCaller, MaintenanceCaller, OperatorCaller, AdminCaller.
State-changing routes take `WriteSession` (on SQLite it holds the write lock from the start).
"""

from __future__ import annotations

from collections.abc import Awaitable, Callable, Iterator
from typing import Annotated

from fastapi import Depends, Request
from sqlalchemy.orm import Session

from service.caller import PEOPLE_RANK, Caller
from service.db.keys import find_key_fields
from service.db.session import Database
from service.errors import Forbidden, Unauthorized
from service.metrics import Metrics
from service.models_registry import ModelRegistry
from service.settings import Settings

async def get_database(request: Request) -> Database:
    return request.app.state.db


async def get_settings(request: Request) -> Settings:
    return request.app.state.settings


def get_registry(request: Request) -> ModelRegistry:
    """The registry, caught up with the cluster's model versions (a one-row check of the
    database; in the thread pool, since catching up loads models from disk)."""
    registry: ModelRegistry = request.app.state.registry
    registry.sync(request.app.state.db)
    return registry


async def get_metrics(request: Request) -> Metrics:
    return request.app.state.metrics


def get_db(request: Request) -> Iterator[Session]:
    with request.app.state.db.session() as session:
        yield session


def get_write_db(request: Request) -> Iterator[Session]:
    """A write session (on SQLite it holds the write lock from its first query). A route
    that fails rolls back here, before its error response is built, so the lock is released
    at once instead of other writers waiting out the busy timeout behind it."""
    session = request.app.state.db.write_session()
    try:
        yield session
    except BaseException:
        session.rollback()
        raise
    finally:
        session.close()


DbSession = Annotated[Session, Depends(get_db)]
WriteSession = Annotated[Session, Depends(get_write_db)]
SettingsDep = Annotated[Settings, Depends(get_settings)]
RegistryDep = Annotated[ModelRegistry, Depends(get_registry)]
MetricsDep = Annotated[Metrics, Depends(get_metrics)]
DatabaseDep = Annotated[Database, Depends(get_database)]


def bearer_key(request: Request) -> str | None:
    header = request.headers.get("authorization")
    if not header:
        return None
    scheme, _, value = header.partition(" ")
    if scheme.lower() != "bearer" or not value.strip():
        return None
    return value.strip()


def get_caller(request: Request) -> Caller:
    """The key's owner; 401 without a key or with a wrong or revoked one.

    In the thread pool, not on the event loop: the look-up is one indexed row, but getting a
    connection can wait (an exhausted pool, an unreachable PostgreSQL), and on the loop that
    wait would stall every request of the worker."""
    cached = getattr(request.state, "caller", None)
    if isinstance(cached, Caller):
        return cached
    key = bearer_key(request)
    if key is None:
        raise Unauthorized("send an API key: 'Authorization: Bearer <key>' (create one with `kilter keys create`)")
    # Looked up on every request (no cache), so a revoked key is refused from the next request on.
    with request.app.state.db.engine.connect() as conn:
        row = find_key_fields(conn, key=key)
    if row is None:
        raise Unauthorized("this API key is unknown or revoked")
    caller = Caller(row.id, row.name, row.role, frozenset(row.assets) if row.assets is not None else None)
    request.state.caller = caller
    return caller


def require_role(role: str) -> Callable[..., Awaitable[Caller]]:
    """A dependency that lets the caller through only with `role` (or above); 403 otherwise."""
    if role not in ("machine", *PEOPLE_RANK):
        raise ValueError(f"unknown role {role!r}")

    async def _check(caller: Annotated[Caller, Depends(get_caller)]) -> Caller:
        if not caller.has_role(role):
            raise Forbidden(f"this needs a {role} key; yours ({caller.name}) is {caller.role}")
        return caller

    _check.__name__ = f"require_{role}"
    return _check


AnyCaller = Annotated[Caller, Depends(get_caller)]
MachineCaller = Annotated[Caller, Depends(require_role("machine"))]
MaintenanceCaller = Annotated[Caller, Depends(require_role("maintenance"))]
OperatorCaller = Annotated[Caller, Depends(require_role("operator"))]
AdminCaller = Annotated[Caller, Depends(require_role("admin"))]
