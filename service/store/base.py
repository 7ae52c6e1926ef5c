"""The one interface of session stores, and opening the one the settings name.

A store keeps opaque values (`service.store.state` encodes them) under session ids and writes with
check-and-set: `save` lands only if the stored value still carries the token the caller read, so
two concurrent clicks on one visit can never both land on the same old state (the loser re-reads
and retries). Every write restarts the session's inactivity timeout. The store also keeps the
active-model choice, so that every worker sharing the store follows one choice.

`shard_of` names the part of the store that holds a session and fails on its own: "" for the
memory store and a single Redis, the master's host:port in a Redis Cluster. The service keeps one
circuit breaker per part.
"""

from __future__ import annotations

from typing import Protocol

from service.config import Settings


class SessionStore(Protocol):
    kind: str  # "memory", "redis" or "redis-cluster"

    def shard_of(self, session_id: str) -> str: ...

    async def load(self, session_id: str) -> bytes | None: ...

    async def save(self, session_id: str, value: bytes, expected_token: bytes) -> bool: ...

    async def delete(self, session_id: str) -> None: ...

    # The shared active-model choice; `slot` names an experiment arm's own choice ("" : the one choice).
    async def load_active_model(self, slot: str = "") -> bytes | None: ...

    async def save_active_model(self, value: bytes, slot: str = "") -> None: ...

    async def report_serving(self, worker: str, value: bytes) -> None:
        """Record what `worker` serves now (a worker reports it at every poll of the shared choice)."""
        ...

    async def serving_reports(self) -> dict[str, bytes]:
        """worker -> its last report."""
        ...

    async def forget_workers(self, workers: list[str]) -> None:
        """Drop the reports of workers that stopped reporting."""
        ...

    async def ping(self) -> None: ...

    async def close(self) -> None: ...


def open_store(settings: Settings) -> SessionStore:
    """The store of `settings.session_store`; nothing is connected yet (`ping` does that)."""
    if settings.session_store == "memory":
        from service.store.memory import MemoryStore

        return MemoryStore(max_entries=settings.memory_max_sessions, ttl_s=settings.session_ttl_s)
    if settings.store_kind == "redis-cluster":
        from service.store.cluster import RedisClusterStore

        return RedisClusterStore(
            settings.session_store,
            ttl_s=settings.session_ttl_s,
            pool_size=settings.redis_pool_size,
            timeout_s=settings.redis_timeout_s,
            connect_timeout_s=settings.redis_connect_timeout_s,
            prefix=settings.redis_prefix,
        )
    from service.store.redis import RedisStore

    return RedisStore(
        settings.session_store,
        ttl_s=settings.session_ttl_s,
        pool_size=settings.redis_pool_size,
        timeout_s=settings.redis_timeout_s,
        connect_timeout_s=settings.redis_connect_timeout_s,
        pool_timeout_s=settings.redis_pool_timeout_s,
        prefix=settings.redis_prefix,
    )
