"""Both session stores through the one interface: check-and-set, TTL, eviction, errors."""

from __future__ import annotations

import asyncio

import pytest
import redis as redis_sync

from service.errors import StoreError
from service.store.memory import MemoryStore
from service.store.redis import RedisCommands, RedisStore, script_result, stored_value
from service.store.state import NEW_TOKEN, SessionState, encode, token_of


def run(coro):
    return asyncio.run(coro)


class Clock:
    def __init__(self) -> None:
        self.now = 100.0

    def __call__(self) -> float:
        return self.now


def redis_store(url: str, prefix: str, ttl_s: float = 60.0, **kw) -> RedisStore:
    options = dict(ttl_s=ttl_s, pool_size=4, timeout_s=1.0, connect_timeout_s=1.0, pool_timeout_s=1.0, prefix=prefix)
    options.update(kw)
    return RedisStore(url, **options)


async def check_and_set_semantics(store) -> None:
    first = SessionState(items=("a",), sequence=1)
    v1 = encode(first, "s")
    assert await store.save("s", v1, NEW_TOKEN)
    assert not await store.save("s", v1, NEW_TOKEN)  # exists already
    assert await store.load("s") == v1
    second = SessionState(items=("a", "b"), sequence=2, nonce=first.nonce)
    v2 = encode(second, "s")
    assert await store.save("s", v2, token_of(v1))
    assert not await store.save("s", encode(SessionState(sequence=2, nonce=first.nonce), "s"), token_of(v1))  # stale token
    assert await store.load("s") == v2
    # After a DELETE a new visit may reach the same sequence; the nonce keeps the old visit's write out.
    await store.delete("s")
    await store.delete("s")  # idempotent
    assert await store.load("s") is None
    other = SessionState(items=("x",), sequence=1)
    assert await store.save("s", encode(other, "s"), NEW_TOKEN)
    late = SessionState(items=("a", "b", "c"), sequence=2, nonce=first.nonce)
    assert not await store.save("s", encode(late, "s"), token_of(v1))
    await store.save_active_model(b'{"x": 1}')
    assert await store.load_active_model() == b'{"x": 1}'
    await store.ping()


def test_memory_check_and_set():
    run(check_and_set_semantics(MemoryStore(max_entries=10, ttl_s=60)))


def test_redis_check_and_set(redis_url):
    async def go():
        store = redis_store(redis_url, "cas:")
        try:
            await check_and_set_semantics(store)
        finally:
            await store.close()

    run(go())


def test_memory_ttl_counts_from_the_last_write():
    clock = Clock()
    store = MemoryStore(max_entries=10, ttl_s=30.0, clock=clock)

    async def go():
        v = encode(SessionState(sequence=1), "s")
        await store.save("s", v, NEW_TOKEN)
        clock.now += 20
        assert await store.load("s") == v  # reading does not extend the timeout
        v2 = encode(SessionState(sequence=2), "s")
        assert await store.save("s", v2, token_of(v))  # writing does
        clock.now += 29
        assert await store.load("s") == v2
        clock.now += 2
        assert await store.load("s") is None
        assert await store.save("s", v, NEW_TOKEN)  # an expired visit is a new one

    run(go())


def test_memory_evicts_least_recently_used():
    store = MemoryStore(max_entries=3, ttl_s=60.0, clock=Clock())

    async def go():
        for name in "abc":
            await store.save(name, encode(SessionState(), name), NEW_TOKEN)
        await store.load("a")  # a is now the most recently used
        await store.save("d", encode(SessionState(), "d"), NEW_TOKEN)
        assert len(store) == 3
        assert await store.load("b") is None
        assert all([await store.load(n) is not None for n in "acd"])

    run(go())


def test_memory_drops_expired_entries_on_write():
    clock = Clock()
    store = MemoryStore(max_entries=100, ttl_s=10.0, clock=clock)

    async def go():
        for i in range(5):
            await store.save(str(i), encode(SessionState(), str(i)), NEW_TOKEN)
        clock.now += 11
        await store.save("new", encode(SessionState(), "new"), NEW_TOKEN)
        assert len(store) == 1

    run(go())


def test_redis_sets_the_ttl_on_every_write(redis_url):
    plain = redis_sync.Redis.from_url(redis_url)

    async def go():
        store = redis_store(redis_url, "ttl:", ttl_s=30.0)
        try:
            v = encode(SessionState(sequence=1), "s")
            await store.save("s", v, NEW_TOKEN)
            assert 29_000 < plain.pttl("ttl:s:s") <= 30_000
            plain.pexpire("ttl:s:s", 5_000)
            await store.save("s", encode(SessionState(sequence=2), "s"), token_of(v))
            assert 29_000 < plain.pttl("ttl:s:s") <= 30_000  # restarted by the write
        finally:
            await store.close()

    run(go())


def test_redis_errors_become_store_errors():
    # A loopback port nobody listens on: connection refused, reported as StoreError chained to redis' error.
    import socket

    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]

    async def go():
        store = redis_store(f"redis://127.0.0.1:{port}/0", "down:", connect_timeout_s=0.5)
        try:
            for call in (store.load("s"), store.save("s", b"v", NEW_TOKEN), store.delete("s"), store.ping(), store.load_active_model()):
                with pytest.raises(StoreError) as info:
                    await call
                assert isinstance(info.value.__cause__, redis_sync.RedisError)
        finally:
            await store.close()

    run(go())


def test_a_failure_inside_the_client_library_is_a_store_error(redis_url, caplog):
    # Seen in a cluster-outage run: redis-py raised AttributeError ('NoneType' object has no
    # attribute 'writelines') from a connection torn down while it was being set up, and the click
    # was answered 500. Any exception out of the client is the store failing: the visit degrades.
    async def go():
        store = redis_store(redis_url, "lib:")
        try:
            async def torn_down(key):
                raise AttributeError("'NoneType' object has no attribute 'writelines'")

            store._client.get = torn_down
            with pytest.raises(StoreError, match="redis GET failed \\(AttributeError") as info:
                await RedisCommands.load(store, "s")
            assert isinstance(info.value.__cause__, AttributeError)
        finally:
            await store.close()

    run(go())
    assert "failed inside the client with AttributeError" in caplog.text  # logged with its traceback


def test_bad_redis_url_is_a_store_error():
    with pytest.raises(StoreError, match="CAIRN_SESSION_STORE"):
        redis_store("redis://127.0.0.1:notaport/0", "x:")


def test_a_reply_of_the_wrong_shape_is_a_store_error_not_a_state(redis_url):
    # A real server never answers GET with a list or the script with anything but 0 or 1, but the
    # cluster client once did while a master was down: the store must refuse such a reply (the
    # visit then degrades) rather than hand it on to be decoded, or count a truthy one as written.
    assert stored_value(None) is None and stored_value(b"x") == b"x"
    assert script_result(1) is True and script_result(0) is False
    for bad in ([b"x", None], {"node": b"x"}, "x", 1):
        with pytest.raises(StoreError, match="redis GET answered with"):
            stored_value(bad)
    for bad in ([1, 1], 2, b"1", None):
        with pytest.raises(StoreError, match="redis check-and-set answered with"):
            script_result(bad)

    async def go():
        store = redis_store(redis_url, "shape:")
        try:
            value = encode(SessionState(items=("a",), sequence=1), "s")
            assert await store.save("s", value, NEW_TOKEN)
            assert await store.load("s") == value  # the real replies pass the checks
            # The base class's path (redis-py's client, as the cluster store uses it) with a GET
            # answered as the failing run saw it.
            async def listed(key):
                return [value, None]

            store._client.get = listed
            with pytest.raises(StoreError, match="a list"):
                await RedisCommands.load(store, "s")
        finally:
            await store.close()

    run(go())
