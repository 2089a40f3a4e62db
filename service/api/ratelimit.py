"""Failed-authentication rate limit per client address, as ASGI middleware.

After `max_failures` responses of 401 to one client address within `window_s` seconds,
that address gets 429 (with Retry-After) on everything but the health, readiness and
metrics endpoints and static files, until its oldest failure in the window ages out. A
wrong key is then as expensive to guess as it should be, and a correct key from another
address is unaffected.

Counts live in each process's memory: with N replicas an address may fail up to N times
the limit before every replica refuses it. That is acceptable for a brute-force brake
(nothing correctness needs lives here). Behind a proxy the client address is the one
uvicorn takes from X-Forwarded-For when the proxy is trusted (FORWARDED_ALLOW_IPS).
"""

from __future__ import annotations

import math
import time
from collections import OrderedDict, deque
from collections.abc import Callable
from typing import Any

from service.errors import error_response

OPEN_PREFIXES = ("/healthz", "/readyz", "/metrics", "/static/")
MAX_TRACKED = 10_000  # addresses remembered at once; the least recently failing are forgotten


class FailedAuthLimit:
    """429 for a client address with too many recent 401s; see the module docstring."""

    def __init__(
        self, app: Any, max_failures: int = 20, window_s: float = 60.0, clock: Callable[[], float] = time.monotonic
    ) -> None:
        self.app, self.max_failures, self.window_s, self.clock = app, max_failures, window_s, clock
        self._failures: OrderedDict[str, deque[float]] = OrderedDict()

    def _recent(self, address: str, now: float) -> deque[float] | None:
        q = self._failures.get(address)
        if q is None:
            return None
        while q and q[0] <= now - self.window_s:
            q.popleft()
        if not q:
            del self._failures[address]
            return None
        return q

    def _record(self, address: str, now: float) -> None:
        q = self._failures.pop(address, None) or deque()
        q.append(now)
        while len(q) > self.max_failures:
            q.popleft()
        self._failures[address] = q
        while len(self._failures) > MAX_TRACKED:
            self._failures.popitem(last=False)

    async def __call__(self, scope: dict[str, Any], receive: Any, send: Any) -> None:
        if scope["type"] != "http" or self.max_failures <= 0:
            await self.app(scope, receive, send)
            return
        client = scope.get("client")
        address = client[0] if client else "unknown"
        path = scope.get("path", "")
        now = self.clock()
        q = self._recent(address, now)
        if q is not None and len(q) >= self.max_failures and not path.startswith(OPEN_PREFIXES):
            retry_after = max(1, math.ceil(q[0] + self.window_s - now))
            response = error_response(
                429, "too_many_failures",
                f"{len(q)} failed authentications from {address} in the last {self.window_s:.0f} s; retry in {retry_after} s",
            )
            response.headers["Retry-After"] = str(retry_after)
            await response(scope, receive, send)
            return

        async def watching_send(msg: dict[str, Any]) -> None:
            if msg["type"] == "http.response.start" and msg["status"] == 401:
                self._record(address, self.clock())
            await send(msg)

        await self.app(scope, receive, watching_send)
