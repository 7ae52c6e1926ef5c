"""Stopping background tasks for sure.

On Python 3.11, `asyncio.wait_for` can lose a cancellation that arrives just as the awaited
operation completes (CPython bpo-42130, fixed in 3.12 by rebuilding `wait_for` on `asyncio.timeout`;
from memory). redis-py awaits its socket writes with `wait_for`, so a task cancelled in the middle of
a Redis call may carry on as if nothing happened, and a shutdown that cancels it once and awaits it
waits forever (seen here: the model follower of a server that never stopped).
"""

from __future__ import annotations

import asyncio
import contextlib

RECANCEL_S = 0.1


async def stop_task(task: asyncio.Task, recancel_s: float = RECANCEL_S) -> None:
    """Cancel `task` and return once it has ended, cancelling again each `recancel_s` while it runs on.
    Its outcome is consumed: a stopped task's error is not reported again by the event loop."""
    while not task.done():
        task.cancel()
        await asyncio.wait({task}, timeout=recancel_s)
    if not task.cancelled():
        with contextlib.suppress(Exception):
            task.exception()
