"""Failed authentication is rate-limited per client address; the limit spares other
addresses, health checks, and lifts once the failures age out of the window."""

from __future__ import annotations

import asyncio
from concurrent.futures import ThreadPoolExecutor
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from inproc import App, start_app
from service.api.ratelimit import FailedAuthLimit


@pytest.fixture
def limited(tmp_path: Path) -> Iterator[App]:
    yield from start_app(tmp_path, auth_fail_limit=5, auth_fail_window_s=60)


def test_wrong_keys_from_one_address_are_refused_after_the_limit(limited: App) -> None:
    app = limited
    wrong = {"Authorization": "Bearer ew_not-a-real-key"}
    codes = [app.client.get("/v1/assets", headers=wrong).status_code for _ in range(5)]
    assert codes == [401] * 5
    r = app.client.get("/v1/assets", headers=wrong)
    assert r.status_code == 429 and int(r.headers["Retry-After"]) >= 1
    assert r.json()["error"]["code"] == "too_many_failures"
    # While blocked, the right key from the same address waits too (that is the brake)...
    assert app.client.get("/v1/assets", headers=app.auth("maintenance")).status_code == 429
    # ...but liveness and readiness stay reachable for the orchestrator.
    assert app.client.get("/healthz").status_code == 200
    assert app.client.get("/readyz").status_code == 200


def test_successes_do_not_count_and_keys_from_elsewhere_pass(limited: App) -> None:
    app = limited
    for _ in range(20):
        assert app.client.get("/v1/assets", headers=app.auth("maintenance")).status_code == 200
    assert app.client.get("/v1/assets", headers={"Authorization": "Bearer wrong"}).status_code == 401


def _call(mw: FailedAuthLimit, address: str, path: str = "/v1/assets") -> int:
    """One request through the middleware alone, from `address`; returns the status sent."""
    sent: list[dict[str, Any]] = []

    async def receive() -> dict[str, Any]:
        return {"type": "http.request", "body": b"", "more_body": False}

    async def send(msg: dict[str, Any]) -> None:
        sent.append(msg)

    scope = {"type": "http", "method": "GET", "path": path, "headers": [], "client": (address, 5000)}
    # A thread of its own, so a loop already running in this thread (e.g. left by another
    # test's library) cannot refuse asyncio.run.
    with ThreadPoolExecutor(max_workers=1) as pool:
        pool.submit(asyncio.run, mw(scope, receive, send)).result()
    return int(sent[0]["status"])


def test_window_slides_and_addresses_are_separate() -> None:
    now = [1000.0]

    async def always_401(scope: Any, receive: Any, send: Any) -> None:
        await send({"type": "http.response.start", "status": 401, "headers": []})
        await send({"type": "http.response.body", "body": b""})

    mw = FailedAuthLimit(always_401, max_failures=3, window_s=10.0, clock=lambda: now[0])
    assert [_call(mw, "10.0.0.1") for _ in range(3)] == [401, 401, 401]
    assert _call(mw, "10.0.0.1") == 429
    assert _call(mw, "10.0.0.2") == 401  # another address has its own count
    now[0] += 10.5  # the failures age out of the window
    assert _call(mw, "10.0.0.1") == 401
