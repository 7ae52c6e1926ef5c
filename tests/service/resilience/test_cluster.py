"""The session store on a real Redis Cluster: three masters on loopback, slots assigned by
`redis-cli --cluster create`. Sessions spread over all three masters, with the same one-value-per-key
state and check-and-set; with one master stopped, the sessions it held get clean degraded answers
(store_unavailable), never errors, while the others keep working.
"""

from __future__ import annotations

import asyncio
from collections.abc import Iterator

import pytest
import redis as redis_sync

from service.store.cluster import RedisClusterStore
from tests.service.resilience.cluster_support import running_cluster, url_of
from service.store.state import NEW_TOKEN, SessionState, decode, encode, token_of

MASTERS = 3


@pytest.fixture(scope="module")
def cluster(tmp_path_factory, kit) -> Iterator[list]:
    with running_cluster(tmp_path_factory.mktemp("cluster"), kit) as nodes:
        yield nodes


def holders(nodes, prefix: str) -> dict[int, set[str]]:
    """port -> the session ids whose keys that master holds (KEYS on a cluster node lists its own keys)."""
    out = {}
    for n in nodes:
        keys = redis_sync.Redis(port=n.port).keys(f"{prefix}s:*")
        out[n.port] = {k.decode().removeprefix(f"{prefix}s:") for k in keys}
    return out


def test_cluster_store_check_and_set(cluster):
    async def go():
        store = RedisClusterStore(url_of(cluster[:1]), ttl_s=60, pool_size=4, timeout_s=1.0, connect_timeout_s=1.0, prefix="cas:")
        try:
            first = SessionState(items=("a",), sequence=1)
            v1 = encode(first, "s")
            assert await store.save("s", v1, NEW_TOKEN)
            assert not await store.save("s", v1, NEW_TOKEN)  # exists already
            v2 = encode(SessionState(items=("a", "b"), sequence=2, nonce=first.nonce), "s")
            assert await store.save("s", v2, token_of(v1))
            assert not await store.save("s", encode(SessionState(sequence=2, nonce=first.nonce), "s"), token_of(v1))  # stale token
            assert await store.load("s") == v2
            await store.delete("s")
            assert await store.load("s") is None
            await store.save_active_model(b'{"x": 1}')
            assert await store.load_active_model() == b'{"x": 1}'
            await store.ping()
            return store.shard_of("s")
        finally:
            await store.close()

    shard = asyncio.run(go())
    assert shard in {f"127.0.0.1:{n.port}" for n in cluster}  # the client knows which master holds the key
    # One startup node was enough: the client read the slot map and wrote to whichever master owns the key.


def test_sessions_spread_over_all_masters(cluster, start_server, offline, sid, kit):
    server = start_server(url_of(cluster))
    sessions = [sid("spread") for _ in range(24)]
    with server.client() as c:
        for s in sessions:
            for n, item in enumerate(("sku-000010", "sku-000020"), start=1):
                answer = c.post(f"/v1/sessions/{s}/clicks", json={"item_id": item}).json()
                assert answer["sequence"] == n and answer["served_by"] == "gru" and answer["fallback_reason"] is None
        assert kit.ids(answer) == offline["v1"].top(["sku-000010", "sku-000020"])
        assert c.get("/readyz").status_code == 200
    held = holders(cluster, server.settings.redis_prefix)
    assert all(held[n.port] for n in cluster), {p: len(v) for p, v in held.items()}  # every master holds some visits
    assert set().union(*held.values()) == set(sessions) and sum(map(len, held.values())) == len(sessions)  # each exactly once
    for n in cluster:
        for s in held[n.port]:
            assert decode(redis_sync.Redis(port=n.port).get(f"{server.settings.redis_prefix}s:{s}"), s).sequence == 2


def test_a_stopped_master_degrades_only_its_own_sessions(cluster, start_server, offline, sid, kit):
    server = start_server(url_of(cluster), store_breaker_min_calls=3, store_breaker_cool_down_s=5.0)
    sessions = [sid("shard") for _ in range(24)]
    with server.client() as c:
        for s in sessions:
            assert c.post(f"/v1/sessions/{s}/clicks", json={"item_id": "sku-000030"}).json()["sequence"] == 1
        held = holders(cluster, server.settings.redis_prefix)
        victim = cluster[0]
        lost, kept = held[victim.port], set(sessions) - held[victim.port]
        assert lost and kept
        victim.kill()
        for round_ in (2, 3):
            for s in sessions:
                # A generous budget: this test is about which visits degrade, not latency (the first
                # failure re-reads the slot map, which a loaded machine can make slow).
                r = c.post(f"/v1/sessions/{s}/clicks", json={"item_id": "sku-000040", "budget_ms": 2000})
                assert r.status_code == 200, r.text
                answer = r.json()
                if s in lost:
                    assert answer["fallback_reason"] == "store_unavailable" and answer["sequence"] == 0
                    assert answer["served_by"] == "neighbours" and kit.ids(answer) == offline["v1"].neighbours("sku-000040")
                else:
                    assert answer["fallback_reason"] is None and answer["served_by"] == "gru" and answer["sequence"] == round_, (round_, answer, r.headers.get("server-timing"))
        ready = c.get("/readyz")
        metrics = c.get("/metrics").text
    assert ready.status_code == 503 and ready.json()["degraded"] == ["store"]
    # The stopped master's breaker opened; the other masters' did not.
    assert kit.metric(metrics, "cairn_breaker_state", breaker=f"store@127.0.0.1:{victim.port}") == 2
    for n in cluster[1:]:
        assert kit.metric(metrics, "cairn_breaker_state", breaker=f"store@127.0.0.1:{n.port}") == 0
