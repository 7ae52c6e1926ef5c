"""The in-process session store: the embedded default for one worker.

Bounded by entries with least-recently-used eviction, and an inactivity timeout counted from the
last write. Everything runs on the event loop without awaiting in between, so a check-and-set is
atomic by construction. Values are the same encoded bytes the Redis store keeps, so both stores
behave alike and a session costs a few hundred bytes.
"""

from __future__ import annotations

import time
from collections import OrderedDict
from collections.abc import Callable

from service.store.state import token_of


class MemoryStore:
    kind = "memory"

    def __init__(self, max_entries: int, ttl_s: float, clock: Callable[[], float] = time.monotonic) -> None:
        self.max_entries = max_entries
        self.ttl_s = ttl_s
        self._clock = clock
        self._entries: OrderedDict[str, tuple[bytes, float]] = OrderedDict()  # id -> (value, expires at), LRU first
        self._active_model: dict[str, bytes] = {}  # slot ("" or an experiment arm) -> choice
        self._serving: dict[str, bytes] = {}

    def __len__(self) -> int:
        return len(self._entries)

    def shard_of(self, session_id: str) -> str:
        return ""

    async def load(self, session_id: str) -> bytes | None:
        entry = self._entries.get(session_id)
        if entry is None:
            return None
        if entry[1] <= self._clock():
            del self._entries[session_id]
            return None
        self._entries.move_to_end(session_id)
        return entry[0]

    async def save(self, session_id: str, value: bytes, expected_token: bytes) -> bool:
        now = self._clock()
        entry = self._entries.get(session_id)
        current = entry[0] if entry is not None and entry[1] > now else None
        if token_of(current) != expected_token:
            return False
        self._entries[session_id] = (value, now + self.ttl_s)
        self._entries.move_to_end(session_id)
        self._evict(now)
        return True

    async def delete(self, session_id: str) -> None:
        self._entries.pop(session_id, None)

    async def load_active_model(self, slot: str = "") -> bytes | None:
        return self._active_model.get(slot)

    async def save_active_model(self, value: bytes, slot: str = "") -> None:
        self._active_model[slot] = value

    async def report_serving(self, worker: str, value: bytes) -> None:
        self._serving[worker] = value

    async def serving_reports(self) -> dict[str, bytes]:
        return dict(self._serving)

    async def forget_workers(self, workers: list[str]) -> None:
        for worker in workers:
            self._serving.pop(worker, None)

    async def ping(self) -> None:
        return None

    async def close(self) -> None:
        self._entries.clear()

    def _evict(self, now: float) -> None:
        # Over the bound: drop least recently used. Expired entries at the old end go too, so an idle
        # store does not hold dead visits until the bound is reached (the rest expire on read).
        entries = self._entries
        while len(entries) > self.max_entries:
            entries.popitem(last=False)
        while entries:
            oldest = next(iter(entries.values()))
            if oldest[1] > now:
                break
            entries.popitem(last=False)
