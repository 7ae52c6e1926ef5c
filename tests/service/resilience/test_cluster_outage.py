"""A Redis Cluster master down, against a real three-master cluster: failed commands do not each
rebuild the slot map on the event loop (at most one rebuild a second, in the background), and a
worker that starts while the master owning slot 0 is down starts degraded and heals."""

from __future__ import annotations

import asyncio
import time
from collections.abc import Iterator

import pytest
import redis as redis_sync

from service.errors import StoreError
from service.store.cluster import REFRESH_S, RedisClusterStore
from service.store.state import NEW_TOKEN, SessionState, encode
from tests.service.resilience.cluster_support import master_of_slot_zero, running_cluster, url_of


@pytest.fixture()
def cluster(tmp_path, kit) -> Iterator[list]:
    with running_cluster(tmp_path, kit) as nodes:
        yield nodes


def owner(nodes, key: str):
    slot = redis_sync.Redis(port=nodes[0].port).execute_command("CLUSTER", "KEYSLOT", key)
    for n in nodes:
        for start, end, master, *_ in redis_sync.Redis(port=n.port).execute_command("CLUSTER", "SLOTS"):
            if start <= slot <= end:
                return next(m for m in nodes if m.port == master[1])
    raise AssertionError(key)


def test_failed_commands_rebuild_the_slot_map_at_most_once_a_second(cluster):
    async def go() -> tuple[int, float, bool]:
        store = RedisClusterStore(url_of(cluster), ttl_s=60, pool_size=4, timeout_s=0.5, connect_timeout_s=0.2, prefix="pace:")
        try:
            sessions = [f"p{i}" for i in range(30)]
            for s in sessions:
                assert await store.save(s, encode(SessionState(items=("a",), sequence=1), s), NEW_TOKEN)
            victim = owner(cluster, store.key(sessions[0]))
            lost = [s for s in sessions if owner(cluster, store.key(s)) is victim]
            kept = [s for s in sessions if s not in lost]
            victim.kill()
            started = time.monotonic()
            failures = 0
            while time.monotonic() - started < 2.0:  # bounded: about 2 s of commands for the dead master
                for s in lost:
                    try:
                        await store.load(s)
                    except Exception:  # noqa: BLE001 - a StoreError for every one of them
                        failures += 1
                await asyncio.sleep(0.02)
            elapsed = time.monotonic() - started
            survivors_fine = all([await store.load(s) is not None for s in kept])
            return store._client.refreshes, elapsed, survivors_fine and failures > 50
        finally:
            await store.close()

    refreshes, elapsed, ok = asyncio.run(go())
    assert ok
    # redis-py alone rebuilds before the next command after every failure (hundreds here).
    assert 1 <= refreshes <= elapsed / REFRESH_S + 2, refreshes


def test_ping_asks_every_master(cluster):
    # redis-py's PING goes to one default node; readiness must see any master down.
    async def go() -> tuple[bool, bool]:
        store = RedisClusterStore(url_of(cluster), ttl_s=60, pool_size=4, timeout_s=0.5, connect_timeout_s=0.2, prefix="ping:")
        try:
            await store.ping()
            whole = True
            for node in cluster:
                if node.port != store._client.get_default_node().port:
                    node.kill()  # a master that is not the one PING would go to by default
                    break
            try:
                await store.ping()
                return whole, False
            except StoreError:
                return whole, True
        finally:
            await store.close()

    whole, refused = asyncio.run(go())
    assert whole and refused


def test_a_worker_started_while_a_master_is_down_serves_degraded_and_heals(cluster, start_server, sid):
    victim = master_of_slot_zero(cluster)  # redis-py would read the command table from it
    victim.kill()
    server = start_server(url_of(cluster), store_breaker_cool_down_s=0.3)
    sessions = [sid("deg") for _ in range(24)]
    with server.client() as c:
        answers = {s: c.post(f"/v1/sessions/{s}/clicks", json={"item_id": "sku-000050"}).json() for s in sessions}
        stored = {s for s, a in answers.items() if a["recorded"] == "yes"}
        degraded = {s for s, a in answers.items() if a["fallback_reason"] == "store_unavailable"}
        assert stored and degraded and stored | degraded == set(sessions)  # started, with the dead master's visits degraded
        assert c.get("/readyz").status_code == 503
        victim.start()  # the master returns (its node file keeps its slots)
        deadline = time.monotonic() + 15
        healed: set[str] = set()
        while healed != degraded and time.monotonic() < deadline:
            for s in degraded - healed:
                r = c.post(f"/v1/sessions/{s}/clicks", json={"item_id": "sku-000051"})
                assert r.status_code == 200, r.text  # while the master comes back: degraded answers, never a 500
                if r.json()["recorded"] == "yes":
                    healed.add(s)
            time.sleep(0.2)
        assert healed == degraded, f"{len(degraded - healed)} visits still not stored"
