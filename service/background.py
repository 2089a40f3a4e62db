"""Blocking work for the app's background loops (retention, notifications), run so that a
shutdown never strands a database connection."""

from __future__ import annotations

import asyncio
from collections.abc import Callable
from typing import Any, TypeVar

T = TypeVar("T")


async def in_thread_to_completion(fn: Callable[..., T], *args: Any, **kwargs: Any) -> T:
    """`fn(*args, **kwargs)` in a worker thread. A cancellation (the app shutting down) waits
    for the thread to finish before it is re-raised: the thread holds a pooled connection, and
    one handed back to a pool that was disposed meanwhile is never closed."""
    job = asyncio.ensure_future(asyncio.to_thread(fn, *args, **kwargs))
    try:
        return await asyncio.shield(job)
    except asyncio.CancelledError:
        await asyncio.wait([job])
        raise
