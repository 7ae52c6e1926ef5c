"""Redis killed in the middle of load and started again on the same port: no request gets a 5xx,
answers come from the clicked item's neighbours marked store_unavailable, /readyz says the store
is degraded (503) while /healthz stays 200, and storing resumes within seconds without a restart.
"""

from __future__ import annotations

import asyncio
import time

import redis as redis_sync

from service.store.state import decode

BREAKER = dict(store_breaker_min_calls=5, store_breaker_cool_down_s=0.3, store_breaker_trial_calls=2)
RESUME_WITHIN_S = 5.0  # "within a few seconds": two cool-downs and the pool's reconnect fit easily


def test_redis_killed_mid_load_and_restarted(start_server, own_redis, offline, sid, kit):
    server = start_server(own_redis.url, **BREAKER)
    sessions = [sid("outage") for _ in range(4)]
    items = [f"sku-{n:06d}" for n in range(0, 400, 13)]
    with kit.Load(server.url, sessions, items, pause_s=0.005) as load, server.client() as c:
        time.sleep(0.5)
        killed_at = time.monotonic()
        own_redis.kill()
        time.sleep(1.0)
        ready = c.get("/readyz")
        health = c.get("/healthz")
        gone = c.delete(f"/v1/sessions/{sessions[0]}")
        restarted_at = time.monotonic()
        own_redis.start()
        resumed_at = None
        while time.monotonic() - restarted_at < RESUME_WITHIN_S + 2:
            recent = [r for r in load.replies[-8:] if r[0] > restarted_at]
            if any(r[3] and r[3]["fallback_reason"] is None and r[3]["sequence"] >= 1 for r in recent):
                resumed_at = min(r[0] for r in recent if r[3]["fallback_reason"] is None)
                break
            time.sleep(0.05)
        time.sleep(0.3)
        ready_after = c.get("/readyz")
        metrics = c.get("/metrics").text

    statuses = {r[2] for r in load.replies}
    assert statuses == {200}, sorted(statuses)  # no 5xx, no transport error, before, during or after
    outage = load.between(killed_at + 0.05, restarted_at)
    assert len(outage) > 20
    for _, _, _, answer, session, item in outage:
        assert answer["fallback_reason"] == "store_unavailable" and answer["sequence"] == 0
        assert answer["served_by"] == "neighbours" and kit.ids(answer)[:5] == offline["v1"].neighbours(item, count=5)
    assert ready.status_code == 503 and ready.json()["degraded"] == ["store"] and ready.json()["store"] is False
    assert health.status_code == 200
    # DELETE cannot be answered without the store: a 503 that names no internals (no address, no driver message).
    assert gone.status_code == 503 and gone.json()["error"] == "store_unavailable"
    assert str(own_redis.port) not in gone.text and "Connection" not in gone.text and "Traceback" not in gone.text

    assert resumed_at is not None and resumed_at - restarted_at < RESUME_WITHIN_S, "storing did not resume"
    assert ready_after.status_code == 200
    # The restarted Redis (no persistence) holds the visits again, written after it came back.
    plain = redis_sync.Redis.from_url(own_redis.url)
    last = {}
    for _, _, _, answer, session, _ in load.replies:
        if answer["fallback_reason"] is None:
            last[session] = answer["sequence"]
    assert last
    for session, sequence in last.items():
        assert decode(plain.get(f"{server.settings.redis_prefix}s:{session}"), session).sequence == sequence
    assert kit.metric(metrics, "cairn_breaker_transitions_total", breaker="store", **{"from": "closed", "to": "open"}) >= 1
    assert kit.metric(metrics, "cairn_breaker_transitions_total", breaker="store", **{"from": "half-open", "to": "closed"}) >= 1
    assert kit.metric(metrics, "cairn_breaker_state", breaker="store") == 0


STALL_SLACK_MS = 60  # an eighth of the 500 ms stall: a wait for the stall still fails the test


class SlowStore:
    """A real store whose reads take `delay_s` longer (a Redis that stalls), set by the test."""

    def __init__(self, inner) -> None:
        self.inner, self.kind, self.delay_s = inner, inner.kind, 0.0

    def __getattr__(self, name):
        return getattr(self.inner, name)

    async def load(self, session_id):
        if self.delay_s:
            await asyncio.sleep(self.delay_s)
        return await self.inner.load(session_id)


def test_a_stalled_store_call_is_abandoned_within_the_budget(start_server, shared_redis, offline, sid, kit):
    stores: list[SlowStore] = []

    def wrap(inner):
        stores.append(SlowStore(inner))
        return stores[-1]

    server = start_server(
        shared_redis.url, wrap_store=wrap, default_budget_ms=40,
        store_breaker_min_calls=4, store_breaker_failure_ratio=0.25, store_breaker_cool_down_s=0.3,
        state_cache_sessions=0,  # every click reads the store (no recent write to start from): each meets the stall
    )  # fmt: skip
    sessions = [sid("stall") for _ in range(6)]
    with server.client() as c:
        for s in sessions:
            assert c.post(f"/v1/sessions/{s}/clicks", json={"item_id": "sku-000050"}).json()["fallback_reason"] is None
        stores[0].delay_s = 0.5  # reads stall for 500 ms, more than ten budgets
        answers = []
        for s in sessions:
            t0 = time.perf_counter()
            answer = c.post(f"/v1/sessions/{s}/clicks", json={"item_id": "sku-000060"}).json()
            answers.append(((time.perf_counter() - t0) * 1e3, answer))
        for ms, answer in answers:
            assert answer["fallback_reason"] == "store_unavailable" and answer["sequence"] == 0
            assert kit.ids(answer) == offline["v1"].neighbours("sku-000060")
            # Abandoned at the 40 ms deadline, far from the 500 ms stall. The bounds leave room for a
            # loaded 2-core CI machine to run the event loop late (CI once saw 47 ms inside the
            # service); how close to the budget answers stay is the resilience benchmark's figure.
            assert ms <= 40 + STALL_SLACK_MS and answer["elapsed_ms"] <= 40 + STALL_SLACK_MS, (ms, answer["elapsed_ms"])
        # 12 calls succeeded (a load and a save per click); the fourth abandoned read makes 4 of 16, a
        # quarter: the breaker opens and the next reads are refused at once.
        assert [ms > 30 for ms, _ in answers] == [True] * 4 + [False] * 2, [round(ms) for ms, _ in answers]
        stores[0].delay_s = 0.0
        time.sleep(0.4)
        back = [c.post(f"/v1/sessions/{s}/clicks", json={"item_id": "sku-000070"}).json() for s in sessions]
        assert [a["sequence"] for a in back] == [2] * 6 and {a["fallback_reason"] for a in back} == {None}
