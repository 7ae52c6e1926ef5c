"""An answer never lies about storage: behind a session store that answers late (a delaying proxy in
front of a real redis-server), `recorded` says "yes" only for a stored click, "no" only for one
that was not written, and "unknown" when the write went out and its answer did not come in time;
a retry with the same event_id is then never applied twice."""

from __future__ import annotations

import time

import pytest
import redis

from service.store.state import decode
from tests._support.delay_proxy import DelayProxy
from tests._support.servers import RedisProcess, free_port, serve_in_thread, shop_settings

DELAY_S = 0.06  # the store's answers arrive this late ...
BUDGET_MS = 20  # ... after the request's budget has run out


@pytest.fixture()
def slow_store():
    server = RedisProcess(free_port()).start()
    try:
        with DelayProxy(server.port) as proxy:
            yield server, proxy
    finally:
        server.stop()


def stored(server: RedisProcess, prefix: str, session: str):
    client = redis.Redis.from_url(server.url)
    try:
        raw = client.get(f"{prefix}s:{session}")
    finally:
        client.close()
    return None if raw is None else decode(raw, session)


def settle(server: RedisProcess, prefix: str, session: str, sequence: int) -> None:
    """Wait (bounded) for late writes to land: what the store holds once nothing is in flight."""
    deadline = time.monotonic() + 3
    while time.monotonic() < deadline:
        state = stored(server, prefix, session)
        if state is not None and state.sequence >= sequence:
            return
        time.sleep(0.05)


def test_a_write_whose_answer_came_late_is_unknown_and_a_retry_is_not_applied_twice(model_store, slow_store, sid):
    server, proxy = slow_store
    # With one worker the click's read comes from the worker's own recent write, so the late
    # answer is the check-and-set's: the write was sent before the budget ran out.
    settings = shop_settings(model_store, proxy.url, tag="rec", state_cache_sessions=1000, log_level="error")
    prefix, session = settings.redis_prefix, sid("rec")
    with serve_in_thread(settings) as running, running.client() as c:
        first = c.post(f"/v1/sessions/{session}/clicks", json={"item_id": "sku-000007", "event_id": "e1"}).json()
        assert first["recorded"] == "yes" and first["sequence"] == 1
        proxy.delay_s = DELAY_S
        late = c.post(f"/v1/sessions/{session}/clicks", json={"item_id": "sku-000008", "event_id": "e2", "budget_ms": BUDGET_MS}).json()
        assert late["recorded"] == "unknown" and late["fallback_reason"] == "store_unavailable", late
        settle(server, prefix, session, 2)
        assert stored(server, prefix, session).sequence == 2  # it did land: "no" would have been a lie
        proxy.delay_s = 0.0
        retry = c.post(f"/v1/sessions/{session}/clicks", json={"item_id": "sku-000008", "event_id": "e2"}).json()
        assert retry["recorded"] == "yes" and retry["duplicate"] and retry["sequence"] == 2
    assert stored(server, prefix, session).sequence == 2  # the retry was not applied again


def test_a_click_answered_not_recorded_is_not_in_the_store(model_store, slow_store, sid):
    server, proxy = slow_store
    # No recent-writes cache: the click must read the visit first, and that read is what comes late.
    settings = shop_settings(model_store, proxy.url, tag="rec", state_cache_sessions=0, log_level="error")
    prefix, session = settings.redis_prefix, sid("rec")
    with serve_in_thread(settings) as running, running.client() as c:
        assert c.post(f"/v1/sessions/{session}/clicks", json={"item_id": "sku-000007", "event_id": "e1"}).json()["recorded"] == "yes"
        proxy.delay_s = DELAY_S
        late = c.post(f"/v1/sessions/{session}/clicks", json={"item_id": "sku-000008", "event_id": "e2", "budget_ms": BUDGET_MS}).json()
        assert late["recorded"] == "no" and late["sequence"] == 0, late
        time.sleep(0.5)  # anything in flight has landed by now
        assert stored(server, prefix, session).sequence == 1  # "no" is true: nothing was written
        proxy.delay_s = 0.0
        again = c.post(f"/v1/sessions/{session}/clicks", json={"item_id": "sku-000008", "event_id": "e2"}).json()
        assert again["recorded"] == "yes" and not again["duplicate"] and again["sequence"] == 2
        current = c.get(f"/v1/sessions/{session}/recommendations").json()
        assert current["recorded"] == "no" and current["sequence"] == 2  # a GET records nothing
