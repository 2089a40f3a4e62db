"""A deadline for a request's head (request line and headers), which uvicorn does not bound:
its keep-alive timeout runs only between requests, so a client sending its headers a byte at
a time would hold a connection (and a slot of the server) for ever.

`HeaderDeadline*Protocol` are uvicorn's own HTTP protocols with one timer added: armed when
a connection opens and again after each response, cancelled once a request's head is
complete; when it fires first, the connection is closed. The body has its own deadline in
the app (service/app.py: BodyGuard). `kilter serve` passes the protocol to uvicorn and the
deadline to its workers through KILTER_HEADER_TIMEOUT_S (service/settings.py).
"""

from __future__ import annotations

import asyncio
import os
from typing import Any

from uvicorn.protocols.http.h11_impl import H11Protocol

ENV = "KILTER_HEADER_TIMEOUT_S"
DEFAULT_S = 10.0


def header_timeout_s() -> float:
    try:
        return max(float(os.environ.get(ENV, DEFAULT_S)), 0.1)
    except ValueError:
        return DEFAULT_S


class _Deadline:
    """The timer logic, mixed into a uvicorn protocol class."""

    _head_timer: asyncio.TimerHandle | None = None

    def _arm_head_timer(self) -> None:
        self._cancel_head_timer()
        loop: asyncio.AbstractEventLoop = self.loop  # type: ignore[attr-defined]
        self._head_timer = loop.call_later(header_timeout_s(), self._head_timed_out)

    def _cancel_head_timer(self) -> None:
        if self._head_timer is not None:
            self._head_timer.cancel()
            self._head_timer = None

    def _head_timed_out(self) -> None:
        self._head_timer = None
        transport: asyncio.Transport = self.transport  # type: ignore[attr-defined]
        if not transport.is_closing():
            transport.close()

    # Before the protocol class in the MRO: these run first and hand on with super().
    def connection_made(self, transport: Any) -> None:
        super().connection_made(transport)  # type: ignore[misc]
        self._arm_head_timer()

    def connection_lost(self, exc: Exception | None) -> None:
        self._cancel_head_timer()
        super().connection_lost(exc)  # type: ignore[misc]

    def on_response_complete(self) -> None:
        super().on_response_complete()  # type: ignore[misc]
        if not self.transport.is_closing():  # type: ignore[attr-defined]
            self._arm_head_timer()


class HeaderDeadlineH11Protocol(_Deadline, H11Protocol):
    def handle_events(self) -> None:
        super().handle_events()
        if self.cycle is not None and not self.cycle.response_complete:  # a new request's head was complete
            self._cancel_head_timer()


try:
    from uvicorn.protocols.http.httptools_impl import HttpToolsProtocol
except ImportError:  # httptools not installed: uvicorn's "auto" would pick h11 too
    HeaderDeadlineProtocol: type = HeaderDeadlineH11Protocol
else:

    class HeaderDeadlineHttpToolsProtocol(_Deadline, HttpToolsProtocol):
        def on_headers_complete(self) -> None:
            self._cancel_head_timer()
            super().on_headers_complete()

    HeaderDeadlineProtocol = HeaderDeadlineHttpToolsProtocol
