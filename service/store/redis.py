"""Session state in Redis: redis-py asyncio (hiredis parser), one bounded blocking pool.

One key per session (`<prefix>s:<session id>`), so a Redis Cluster shards sessions without any
cross-slot command. A write is a check-and-set in a server-side Lua script that compares the
stored value's token (sequence number + visit nonce, bytes 1..16 of the value, see
`service.store.state`) with the one the writer read, and sets the value with PX, which restarts
the inactivity timeout on every write. Each command runs under the pool's socket timeout; there
are no automatic retries, since a retried check-and-set whose first reply was lost would report a
conflict for its own write. Redis errors become `StoreError`, chained with `from`.
"""

from __future__ import annotations

from typing import Any

import redis.asyncio as aioredis
from redis.asyncio.retry import Retry
from redis.backoff import NoBackoff
from redis.exceptions import RedisError

from service.errors import StoreError
from service.store.state import TOKEN_SLICE

# KEYS[1] session key; ARGV[1] expected token ("" = must not exist), ARGV[2] new value, ARGV[3] TTL ms.
# Lua strings are 1-based and string.sub's end is inclusive: bytes 1..16 of the value are sub(2, 17).
_CHECK_AND_SET = f"""
local cur = redis.call('GET', KEYS[1])
if cur then
  if string.sub(cur, {TOKEN_SLICE.start + 1}, {TOKEN_SLICE.stop}) ~= ARGV[1] then return 0 end
elseif ARGV[1] ~= '' then
  return 0
end
redis.call('SET', KEYS[1], ARGV[2], 'PX', ARGV[3])
return 1
"""


class RedisStore:
    kind = "redis"

    def __init__(
        self,
        url: str,
        ttl_s: float,
        pool_size: int,
        timeout_s: float,
        connect_timeout_s: float,
        pool_timeout_s: float,
        prefix: str = "cairn:",
    ) -> None:
        self.ttl_ms = max(1, int(round(ttl_s * 1000)))
        self._session_prefix = f"{prefix}s:"
        self._active_key = f"{prefix}active-model"
        no_retry = Retry(NoBackoff(), 0)
        try:
            self._pool = aioredis.BlockingConnectionPool.from_url(
                url,
                max_connections=pool_size,
                timeout=pool_timeout_s,
                socket_timeout=timeout_s,
                socket_connect_timeout=connect_timeout_s,
                retry=no_retry,
            )
        except (ValueError, RedisError) as exc:
            raise StoreError(f"CAIRN_STORE: cannot use {url!r} ({exc})") from exc
        self._client = aioredis.Redis(connection_pool=self._pool, retry=no_retry)
        self._check_and_set = self._client.register_script(_CHECK_AND_SET)

    def key(self, session_id: str) -> str:
        return self._session_prefix + session_id

    async def load(self, session_id: str) -> bytes | None:
        return await self._call("GET", self._client.get(self.key(session_id)))

    async def save(self, session_id: str, value: bytes, expected_token: bytes) -> bool:
        done = await self._call(
            "check-and-set", self._check_and_set(keys=[self.key(session_id)], args=[expected_token, value, self.ttl_ms])
        )
        return bool(done)

    async def delete(self, session_id: str) -> None:
        await self._call("DEL", self._client.delete(self.key(session_id)))

    async def load_active_model(self) -> bytes | None:
        return await self._call("GET", self._client.get(self._active_key))

    async def save_active_model(self, value: bytes) -> None:
        await self._call("SET", self._client.set(self._active_key, value))

    async def ping(self) -> None:
        await self._call("PING", self._client.ping())

    async def close(self) -> None:
        try:
            await self._client.aclose()
            await self._pool.aclose()
        except (RedisError, OSError) as exc:
            raise StoreError(f"redis close failed ({type(exc).__name__}: {exc})") from exc

    @staticmethod
    async def _call(what: str, pending: Any) -> Any:
        try:
            return await pending
        except (RedisError, OSError) as exc:
            # The message says which command and why; it never carries a session's value.
            raise StoreError(f"redis {what} failed ({type(exc).__name__}: {exc})") from exc
