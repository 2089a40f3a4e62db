"""Failed-authentication limit per client address, as ASGI middleware, counted in the
database across workers and replicas (service/db/auth_failures.py).

Every 401 the app answers is recorded against the client address. Once an address has
`max_failures` failures within `window_s` seconds, its further *failing* requests get 429
(with Retry-After) instead of 401, and are not counted, so the table stays small. A request
that authenticates is never refused: a correct key works from an address where others keep
failing (an office behind one NAT, a shared gateway). Successful requests cost nothing
here: the database is asked only when the app's answer is a 401.

The client address is the TCP peer, or the address a trusted proxy put in X-Forwarded-For
when the peer is one of KILTER_TRUSTED_PROXIES (default none: the header is ignored);
app.py puts that rewrite (uvicorn's ProxyHeadersMiddleware) in front of this one, and
`kilter serve` turns uvicorn's own trust of loopback peers off.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from typing import Any

import anyio.to_thread

from service.db import auth_failures
from service.api.errors import error_response


class FailedAuthLimit:
    """429 instead of 401 for a client address with too many recent 401s; see the module docstring."""

    def __init__(self, app: Any, max_failures: int = 20, window_s: float = 60.0, clock: Callable[[], float] = time.time) -> None:
        self.app, self.max_failures, self.window_s, self.clock = app, max_failures, window_s, clock

    def _judge(self, db: Any, address: str) -> int | None:
        """Seconds to wait when the address is over the limit (nothing recorded), else None (the failure recorded)."""
        now_ms = int(self.clock() * 1000)
        window_ms = int(self.window_s * 1000)
        n, oldest = auth_failures.recent(db, address=address, since_ms=now_ms - window_ms)
        if n >= self.max_failures and oldest is not None:
            return max(1, math.ceil((oldest + window_ms - now_ms) / 1000))
        auth_failures.record(db, address=address, at_ms=now_ms, forget_before_ms=now_ms - window_ms)
        return None

    async def __call__(self, scope: dict[str, Any], receive: Any, send: Any) -> None:
        if scope["type"] != "http" or self.max_failures <= 0:
            await self.app(scope, receive, send)
            return
        client = scope.get("client")
        address = client[0] if client else "unknown"
        db = scope["app"].state.db
        replaced = False

        async def watching_send(msg: dict[str, Any]) -> None:
            nonlocal replaced
            if msg["type"] == "http.response.start" and msg["status"] == 401:
                retry_after = await anyio.to_thread.run_sync(self._judge, db, address)
                if retry_after is not None:
                    replaced = True
                    response = error_response(
                        429, "too_many_failures",
                        f"{self.max_failures} or more failed authentications from {address} in the last {self.window_s:.0f} s; "
                        f"retry in {retry_after} s (a valid key is still accepted)",
                    )
                    response.headers["Retry-After"] = str(retry_after)
                    await response({"type": "http"}, receive, send)
                    return
            if replaced:
                return  # the 401's body: the 429 went instead
            await send(msg)

        await self.app(scope, receive, watching_send)
