"""Session state in Redis: redis-py asyncio (hiredis parser), one bounded blocking pool, and one
pipelined connection for the click path.

One key per session (`<prefix>s:<session id>`), so a Redis Cluster shards sessions without any
cross-slot command (`service.store.cluster` shares the script and the error handling below). A
write is a check-and-set in a server-side Lua script that compares the stored value's token
(sequence number + visit nonce, bytes 1..16 of the value, see `service.store.state`) with the one
the writer read, and sets the value with PX, which restarts the inactivity timeout on every write.
The script touches its one key only, so it runs on whichever cluster node holds that key.

It is sent as EVALSHA, and as EVAL when the server answers NOSCRIPT (a restarted Redis has an
empty script cache; EVAL caches it again). Not SCRIPT LOAD: on a cluster that goes to every master,
and fails while one is down. Each command runs under the pool's socket timeout; there are no
automatic retries, since a retried check-and-set whose first reply was lost would report a conflict
for its own write. Redis errors become `StoreError`, chained with `from`, with any password in the
URL hidden.

A single Redis's store sends a click's GET and check-and-set over one connection shared by all
requests, pipelined (service/store/pipelined.py: one write per event-loop turn, replies matched in
order); measured side by side at 32 callers, a command costs about a seventh of the CPU it costs
through the pooled client. Same rules: no retries, the socket timeout, errors as redis-py's. The
commands are packed here, all but their per-session parts prepared at start. The cluster store keeps redis-py's client,
which routes each key to its master.

After a connection error the pool's idle connections are dropped too: when Redis restarts, every
pooled socket is dead, and each would otherwise fail one more request (and hold a breaker open)
before being replaced.
"""

from __future__ import annotations

import contextlib
import hashlib
import logging
from typing import Any

import redis.asyncio as aioredis
from redis.asyncio.retry import Retry
from redis.backoff import NoBackoff
from redis.exceptions import ConnectionError as RedisConnectionError
from redis.exceptions import NoScriptError, RedisClusterException, RedisError

from service.config import redacted
from service.errors import StoreError
from service.store.pipelined import PipelinedConnection, bulk, pack
from service.store.state import TOKEN_SLICE

# KEYS[1] session key; ARGV[1] expected token ("" = must not exist), ARGV[2] new value, ARGV[3] TTL ms.
# Lua strings are 1-based and string.sub's end is inclusive: bytes 1..16 of the value are sub(2, 17).
CHECK_AND_SET = f"""
local cur = redis.call('GET', KEYS[1])
if cur then
  if string.sub(cur, {TOKEN_SLICE.start + 1}, {TOKEN_SLICE.stop}) ~= ARGV[1] then return 0 end
elseif ARGV[1] ~= '' then
  return 0
end
redis.call('SET', KEYS[1], ARGV[2], 'PX', ARGV[3])
return 1
"""
CHECK_AND_SET_SHA = hashlib.sha1(CHECK_AND_SET.encode()).hexdigest()
REDIS_ERRORS = (RedisError, RedisClusterException, OSError)  # RedisClusterException is not a RedisError

log = logging.getLogger("cairn.store")


async def check_and_set(client: Any, key: str, expected_token: bytes, value: bytes, ttl_ms: int) -> bool:
    """Run the check-and-set script on the node that holds `key`."""
    try:
        done = await client.evalsha(CHECK_AND_SET_SHA, 1, key, expected_token, value, ttl_ms)
    except NoScriptError:
        done = await client.eval(CHECK_AND_SET, 1, key, expected_token, value, ttl_ms)
    return script_result(done)


def stored_value(raw: Any) -> bytes | None:
    """A GET reply as the store returns it; StoreError for anything but a value or nil. Once, in a
    full test run, the cluster client answered a GET with a list while a master was down (cause
    not found); decoding it failed the click with a 500. Whatever such a reply is, it is no session's
    state, so it counts as a store failure (the visit degrades, the breaker counts it). A reply of
    the right type but another session's value is caught when it is decoded (its owner differs)."""
    if raw is None or isinstance(raw, bytes):
        return raw
    raise StoreError(f"redis GET answered with a {type(raw).__name__}, not a stored value")


def script_result(raw: Any) -> bool:
    """The check-and-set script's reply, 1 or 0; StoreError for anything else (see stored_value):
    any other truthy reply would have counted as a write that happened."""
    if isinstance(raw, int) and raw in (0, 1):
        return bool(raw)
    raise StoreError(f"redis check-and-set answered with {type(raw).__name__} {raw!r:.40}, not 0 or 1")


def store_error(what: str, exc: BaseException) -> StoreError:
    # The message says which command and why; it never carries a session's value or a password.
    return StoreError(f"redis {what} failed ({type(exc).__name__}: {redacted(str(exc))})")


class RedisCommands:
    """The store's commands on one redis-py asyncio client, a single Redis's or a cluster's: the
    subclass opens `_client` and sets the key prefixes and `ttl_ms`. Redis errors become
    `StoreError`; after a connection error `_connection_lost` runs first."""

    _client: Any
    _session_prefix: str
    _active_key: str
    _serving_key: str
    ttl_ms: int

    def key(self, session_id: str) -> str:
        return self._session_prefix + session_id

    async def load(self, session_id: str) -> bytes | None:
        return stored_value(await self._call("GET", self._client.get(self.key(session_id))))

    async def save(self, session_id: str, value: bytes, expected_token: bytes) -> bool:
        return await self._call("check-and-set", check_and_set(self._client, self.key(session_id), expected_token, value, self.ttl_ms))

    async def delete(self, session_id: str) -> None:
        await self._call("DEL", self._client.delete(self.key(session_id)))

    async def load_active_model(self, slot: str = "") -> bytes | None:
        return await self._call("GET", self._client.get(self._active_key + (f":{slot}" if slot else "")))

    async def save_active_model(self, value: bytes, slot: str = "") -> None:
        await self._call("SET", self._client.set(self._active_key + (f":{slot}" if slot else ""), value))

    async def report_serving(self, worker: str, value: bytes) -> None:
        await self._call("HSET", self._client.hset(self._serving_key, worker, value))

    async def serving_reports(self) -> dict[str, bytes]:
        raw = await self._call("HGETALL", self._client.hgetall(self._serving_key))
        return {(k.decode() if isinstance(k, bytes) else k): v for k, v in raw.items()}

    async def forget_workers(self, workers: list[str]) -> None:
        if workers:
            await self._call("HDEL", self._client.hdel(self._serving_key, *workers))

    async def ping(self) -> None:
        await self._call("PING", self._client.ping())

    async def close(self) -> None:
        try:
            await self._client.aclose()
        except REDIS_ERRORS as exc:
            raise store_error("close", exc) from exc

    async def _call(self, what: str, pending: Any) -> Any:
        try:
            return await pending
        except REDIS_ERRORS as exc:
            if isinstance(exc, (RedisConnectionError, OSError)):
                with contextlib.suppress(*REDIS_ERRORS):
                    await self._connection_lost()
            raise store_error(what, exc) from exc
        except Exception as exc:  # noqa: BLE001 - a failure of the client library is still the store's
            # redis-py's asyncio connection has failed with AttributeError ('NoneType' object has no
            # attribute 'writelines') when a cluster node restarted while a connection to it was being
            # set up: the click must degrade like any store failure, not answer 500. Logged with its
            # traceback, so a fault of our own does not pass as an outage unseen.
            log.warning("redis %s failed inside the client with %s", what, type(exc).__name__, exc_info=True)
            with contextlib.suppress(*REDIS_ERRORS):
                await self._connection_lost()
            raise store_error(what, exc) from exc

    async def _connection_lost(self) -> None:
        """Nothing by default: the cluster client replaces a failed node's connections itself."""


class RedisStore(RedisCommands):
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
        self._serving_key = f"{prefix}serving-workers"
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
            raise StoreError(f"CAIRN_SESSION_STORE: cannot use {redacted(url)!r} ({redacted(str(exc))})") from exc
        self._client = aioredis.Redis(connection_pool=self._pool, retry=no_retry)
        # The click path's two commands go over one pipelined connection (service/store/pipelined.py),
        # the rest (model choice, reports, DEL, PING) through the pool. Commands are packed here once
        # up to their per-session parts.
        self._pipe = PipelinedConnection(self._pool.make_connection, timeout_s)
        self._key_prefix = self._session_prefix.encode()
        self._evalsha_head = b"*7\r\n" + bulk(b"EVALSHA", CHECK_AND_SET_SHA.encode(), b"1")  # 7 parts: these 3 + key, token, value, TTL
        self._ttl_tail = bulk(str(self.ttl_ms).encode())

    async def load(self, session_id: str) -> bytes | None:
        key = self._key_prefix + session_id.encode()
        return stored_value(await self._call("GET", self._pipe.call(b"*2\r\n$3\r\nGET\r\n$%d\r\n%s\r\n" % (len(key), key))))

    async def save(self, session_id: str, value: bytes, expected_token: bytes) -> bool:
        key = self._key_prefix + session_id.encode()
        command = b"%s$%d\r\n%s\r\n$%d\r\n%s\r\n$%d\r\n%s\r\n%s" % (
            self._evalsha_head, len(key), key, len(expected_token), expected_token, len(value), value, self._ttl_tail
        )
        return await self._call("check-and-set", self._check_and_set(command, key, expected_token, value))

    async def _check_and_set(self, command: bytes, key: bytes, expected_token: bytes, value: bytes) -> bool:
        try:
            done = await self._pipe.call(command)
        except NoScriptError:  # a restarted Redis has an empty script cache: EVAL caches it again
            done = await self._pipe.call(pack(b"EVAL", CHECK_AND_SET.encode(), b"1", key, expected_token, value, str(self.ttl_ms).encode()))
        return script_result(done)

    def shard_of(self, session_id: str) -> str:
        return ""

    async def close(self) -> None:
        await self._pipe.close()
        await super().close()
        try:
            await self._pool.aclose()
        except REDIS_ERRORS as exc:
            raise store_error("close", exc) from exc

    async def _connection_lost(self) -> None:
        # Every pooled socket of a restarted Redis is dead: drop the idle ones now.
        await self._pool.disconnect(inuse_connections=False)
