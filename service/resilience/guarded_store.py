"""The session store behind its circuit breaker and the request's deadline.

Each call goes through the breaker of the part of the store that holds the session (one for a single
Redis, one per Redis Cluster master) and is bounded by what is left of the request's budget; a call
that times out or fails counts against that breaker. The in-process memory store cannot stall or
fail on its own, so it runs unguarded, as does every store with the guards off (CAIRN_GUARDS=false).
"""

from __future__ import annotations

import asyncio
import time
from collections.abc import Awaitable, Callable
from typing import Any

from service.errors import StoreError, StoreWriteUnknownError
from service.resilience.guards import Guards
from service.runtime.timing import Timing
from service.store.base import SessionStore

class _Refused(StoreError):
    """The breaker refused the call: nothing was sent."""


MIN_STORE_WAIT_S = 0.002  # least time a store call gets; a loopback Redis round trip is 0.1-0.3 ms (measured)


class GuardedStore:
    def __init__(self, store: SessionStore, guards: Guards | None) -> None:
        self.store = store
        self.guards = guards
        self.guarded = guards is not None and guards.enabled and store.kind != "memory"

    def save_reserve_s(self, now: float) -> float:
        """Time a click keeps in reserve for writing its state: the running p95 of one store call."""
        return self.guards.store_latency.estimate(now) if self.guarded else 0.0

    async def load(self, session_id: str, deadline: float, timing: Timing) -> bytes | None:
        return await self._call(self.store.load, (session_id,), session_id, deadline, timing)

    async def save(self, session_id: str, value: bytes, expected: bytes, deadline: float, timing: Timing) -> bool:
        """True when the write landed, False when the check-and-set lost (nothing written);
        StoreError when it was never sent (breaker open), StoreWriteUnknownError when it was sent
        and no answer came in time: the caller must not claim either outcome."""
        try:
            return await self._call(self.store.save, (session_id, value, expected), session_id, deadline, timing)
        except _Refused:
            raise
        except StoreError as exc:
            raise StoreWriteUnknownError(f"the write's outcome is unknown ({exc})") from exc

    async def delete(self, session_id: str, deadline: float, timing: Timing) -> None:
        await self._call(self.store.delete, (session_id,), session_id, deadline, timing)

    async def _call(
        self, method: Callable[..., Awaitable[Any]], args: tuple, session_id: str, deadline: float, timing: Timing
    ) -> Any:
        t0 = time.perf_counter()
        try:
            if not self.guarded:
                return await method(*args)
            breaker = self.guards.store_breaker(self.store.shard_of(session_id))
            ticket = breaker.allow()
            if ticket is None:
                raise _Refused(f"circuit breaker {breaker.name} is open")
            left = deadline - t0
            try:
                async with asyncio.timeout(left if left > MIN_STORE_WAIT_S else MIN_STORE_WAIT_S):
                    result = await method(*args)
            except TimeoutError as exc:
                breaker.record(ticket, False)
                raise StoreError("no answer within the request's budget") from exc
            except StoreError:
                breaker.record(ticket, False)
                raise
            except BaseException:
                breaker.release(ticket)
                raise
            now = time.perf_counter()
            breaker.record(ticket, True)
            self.guards.store_latency.observe(now - t0, now)
            return result
        finally:
            timing.store_s += time.perf_counter() - t0
