"""The Redis store's click path over one pipelined connection, against a real redis-server.

What the pooled client guaranteed must still hold: replies reach their own callers, concurrent
clicks of one visit lose none (check-and-set), every write restarts the TTL, a flushed script cache
is refilled, a caller that gives up leaves the connection usable, a stalled or restarted Redis
fails the waiting commands as StoreError and the next command connects afresh.
"""

from __future__ import annotations

import asyncio

import pytest
import redis as redis_sync

from service.errors import StoreError
from service.store.redis import RedisStore
from service.store.state import NEW_TOKEN, SessionState, decode, encode, token_of
from tests._support.delay_proxy import DelayProxy
from tests._support.servers import RedisProcess, free_port


def redis_store(url: str, prefix: str, timeout_s: float = 1.0, ttl_s: float = 60.0) -> RedisStore:
    return RedisStore(url, ttl_s=ttl_s, pool_size=2, timeout_s=timeout_s, connect_timeout_s=1.0, pool_timeout_s=1.0, prefix=prefix)


async def click(store: RedisStore, session_id: str, item: str) -> int:
    """One click as the service applies it: read, add the item, check-and-set; re-read on a lost race.
    Returns the rounds it took."""
    for rounds in range(1, 1000):
        raw = await store.load(session_id)
        state = decode(raw, session_id) if raw is not None else None
        new = SessionState(
            items=((*state.items, item) if state else (item,))[-20:],
            sequence=(state.sequence if state else 0) + 1,
            **({"nonce": state.nonce} if state else {}),
        )
        if await store.save(session_id, encode(new, session_id), token_of(raw)):
            return rounds
    raise AssertionError("a click never landed")


def test_replies_reach_their_own_callers(redis_url):
    async def go():
        store = redis_store(redis_url, "pipe-order:")
        try:
            values = {f"s{i}": encode(SessionState(items=(f"item-{i}",) * (i % 7 + 1), sequence=1), f"s{i}") for i in range(300)}
            assert all(await asyncio.gather(*(store.save(k, v, NEW_TOKEN) for k, v in values.items())))
            got = await asyncio.gather(*(store.load(k) for k in values), store.load("absent"))
            assert got[:-1] == list(values.values()) and got[-1] is None
            assert store._pipe.connects == 1  # all of it over one connection
        finally:
            await store.close()

    asyncio.run(go())


def test_concurrent_clicks_of_one_visit_lose_none(redis_url):
    # Two stores stand for two workers; within each, clicks of the one visit run at once.
    async def go():
        stores = [redis_store(redis_url, "pipe-race:"), redis_store(redis_url, "pipe-race:")]
        try:
            items = [f"i{n}" for n in range(60)]
            rounds = await asyncio.gather(*(click(stores[n % 2], "visit", item) for n, item in enumerate(items)))
            state = decode(await stores[0].load("visit"), "visit")
            assert state.sequence == len(items)  # every click applied once
            assert len(state.items) == 20 and len(set(state.items)) == 20 and set(state.items) <= set(items)  # 20 kept (this helper's cap), each a distinct click of the visit
            assert max(rounds) > 1  # they did race: some lost a round and retried
        finally:
            for store in stores:
                await store.close()

    asyncio.run(go())


def test_every_write_sets_the_ttl_and_a_flushed_script_cache_is_refilled(redis_url):
    plain = redis_sync.Redis.from_url(redis_url)

    async def go():
        store = redis_store(redis_url, "pipe-ttl:", ttl_s=30.0)
        try:
            v1 = encode(SessionState(items=("a",), sequence=1), "s")
            assert await store.save("s", v1, NEW_TOKEN)
            assert 29_000 < plain.pttl("pipe-ttl:s:s") <= 30_000
            plain.pexpire("pipe-ttl:s:s", 5_000)
            plain.script_flush()  # as after a Redis restart: EVALSHA answers NOSCRIPT, EVAL follows
            v2 = encode(SessionState(items=("a", "b"), sequence=2, nonce=decode(v1, "s").nonce), "s")
            assert await store.save("s", v2, token_of(v1))
            assert 29_000 < plain.pttl("pipe-ttl:s:s") <= 30_000  # restarted by the write
            assert not await store.save("s", v2, token_of(v1))  # stale token, script cached again
            assert await store.load("s") == v2
        finally:
            await store.close()

    asyncio.run(go())


def test_a_caller_that_gives_up_leaves_the_connection_usable(redis_url):
    port = int(redis_url.rsplit(":", 1)[1].split("/")[0])
    with DelayProxy(port) as proxy:

        async def go():
            store = redis_store(proxy.url, "pipe-cancel:", timeout_s=2.0)
            try:
                value = encode(SessionState(items=("a",), sequence=1), "s")
                assert await store.save("s", value, NEW_TOKEN)
                proxy.delay_s = 0.2
                with pytest.raises(TimeoutError):
                    async with asyncio.timeout(0.05):  # the request's deadline, as the guarded store sets it
                        await store.load("s")
                proxy.delay_s = 0.0
                assert await store.load("s") == value  # the late reply was dropped, not given to this caller
                assert store._pipe.connects == 1
            finally:
                await store.close()

        asyncio.run(go())


def test_a_stalled_redis_fails_waiting_commands_after_the_timeout(redis_url):
    port = int(redis_url.rsplit(":", 1)[1].split("/")[0])
    with DelayProxy(port) as proxy:

        async def go():
            store = redis_store(proxy.url, "pipe-stall:", timeout_s=0.2)
            try:
                assert await store.load("s") is None
                proxy.delay_s = 1.0
                loop = asyncio.get_running_loop()
                t0 = loop.time()
                results = await asyncio.gather(store.load("s"), store.load("t"), return_exceptions=True)
                assert all(isinstance(r, StoreError) and "TimeoutError" in str(r) for r in results), results
                assert loop.time() - t0 < 0.9  # failed by the timeout, not by the late reply
                proxy.delay_s = 0.0
                assert await store.load("s") is None  # a new connection
                assert store._pipe.connects == 2
            finally:
                await store.close()

        asyncio.run(go())


def test_a_restarted_redis_is_reached_again_by_the_next_command():
    port = free_port()
    redis = RedisProcess(port).start()
    restarted = RedisProcess(port)

    async def go():
        store = redis_store(redis.url, "pipe-restart:")
        try:
            value = encode(SessionState(items=("a",), sequence=1), "s")
            assert await store.save("s", value, NEW_TOKEN)
            redis.kill()
            with pytest.raises(StoreError):
                await store.load("s")
            restarted.start()  # empty: no persistence, no scripts cached
            assert await store.load("s") is None
            assert await store.save("s", value, NEW_TOKEN)  # EVALSHA -> NOSCRIPT -> EVAL
            assert store._pipe.connects == 2
        finally:
            await store.close()

    try:
        asyncio.run(go())
    finally:
        redis.kill()
        restarted.stop()
