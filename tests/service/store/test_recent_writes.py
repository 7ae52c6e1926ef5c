"""A worker's recent writes (service/store/recent.py): the read they save, and why they are never trusted.

Two `Visits` objects with a recent-writes cache each, sharing one real redis-server, stand for two
worker processes: a visit that moves between them leaves a stale entry behind, which the
check-and-set must catch (the click is computed again from the stored state, nothing is lost).
"""

from __future__ import annotations

import asyncio

from service.runtime.active import ActiveModel, ModelChoice
from service.runtime.timing import Timing
from service.runtime.visits import Visits
from service.store.base import open_store
from service.store.recent import RecentWrites
from service.store.state import SessionState, decode
from tests._support.stores import CountingStore


class FakeClock:
    def __init__(self) -> None:
        self.now = 100.0

    def __call__(self) -> float:
        return self.now


# -- the cache's own rules ------------------------------------------------------------------------


def test_an_entry_expires_with_the_ttl_counted_from_before_the_write():
    clock = FakeClock()
    recent = RecentWrites(max_entries=10, ttl_s=30.0, clock=clock)
    written_at = clock()
    clock.now += 0.5  # the write's round trip: the store's TTL started somewhere in between
    recent.put("a", b"value", written_at)
    clock.now = written_at + 29.9
    assert recent.get("a") == b"value"
    clock.now = written_at + 30.0  # the store's copy lives at least this long: the entry may not outlive it
    assert recent.get("a") is None
    assert len(recent) == 0 and (recent.hits, recent.misses) == (1, 1)


def test_the_least_recently_written_entry_leaves_first_and_forget_drops_one():
    clock = FakeClock()
    recent = RecentWrites(max_entries=2, ttl_s=30.0, clock=clock)
    recent.put("a", b"1", clock())
    recent.put("b", b"2", clock())
    recent.put("a", b"3", clock())  # a written again: b is now the oldest
    recent.put("c", b"4", clock())
    assert (recent.get("a"), recent.get("b"), recent.get("c")) == (b"3", None, b"4")
    recent.forget("a")
    recent.forget("never-written")
    assert recent.get("a") is None and len(recent) == 1


def test_an_entry_hands_back_the_state_given_with_its_value():
    clock = FakeClock()
    recent = RecentWrites(max_entries=2, ttl_s=30.0, clock=clock)
    state = SessionState(items=("a",), sequence=1)
    recent.put("with", b"v1", clock(), state)
    recent.put("without", b"v2", clock())
    assert recent.lookup("with") == (b"v1", state)
    assert recent.lookup("without") == (b"v2", None)  # the caller decodes the value itself
    assert recent.lookup("absent") is None


# -- through the click path, against a real Redis -------------------------------------------------


def _workers(settings, n: int):
    store = CountingStore(open_store(settings))
    active = ActiveModel(settings, store)
    visits = [Visits(store, active, 20, 16, recent=RecentWrites(1000, settings.session_ttl_s)) for _ in range(n)]
    return store, active, visits


def _click(visits: Visits, session: str, item: str):
    return visits.click(session, item, None, 5, True, 10.0, Timing())


def test_one_worker_reads_a_visit_once_then_starts_from_its_own_writes(settings_for, redis_url):
    settings = settings_for(redis_url)

    async def go():
        store, active, (worker,) = _workers(settings, 1)
        await active.open(ModelChoice("shop", "v1", "gru"))
        try:
            answers = [await _click(worker, "one-worker", f"sku-{n:06d}") for n in range(8)]
            stored = await store.inner.load("one-worker")
            final = decode(stored, "one-worker")
            # What the next click starts from without decoding: the stored value and exactly its state.
            assert worker.recent.lookup("one-worker") == (stored, final)
        finally:
            await active.close()
            await store.close()
        return answers, final, store.reads, worker.recent

    answers, final, reads, recent = asyncio.run(go())
    assert [a.sequence for a in answers] == list(range(1, 9))
    assert all(a.served_by == "gru" and a.fallback_reason is None for a in answers)
    assert final.sequence == 8 and final.items == tuple(f"sku-{n:06d}" for n in range(8))
    assert reads == 1  # the first click of the visit; the other seven started from the recent write
    assert (recent.hits, recent.misses) == (8, 1)  # the lookup above is the eighth hit


def test_a_visit_moving_between_workers_loses_no_click_and_matches_one_worker(settings_for, redis_url):
    settings = settings_for(redis_url)
    items = [f"sku-{n:06d}" for n in (11, 222, 333, 444, 555, 666, 777)]

    async def go():
        store, active, (a, b) = _workers(settings, 2)
        _, reference_active, (reference,) = _workers(settings, 1)
        await active.open(ModelChoice("shop", "v1", "gru"))
        await reference_active.open(ModelChoice("shop", "v1", "gru"))
        try:
            # a, a, b, a, b, b, a: each switch leaves the other worker's entry stale.
            moved = [await _click(w, "moving", item) for w, item in zip((a, a, b, a, b, b, a), items)]
            stayed = [await _click(reference, "staying", item) for item in items]
            final = decode(await store.inner.load("moving"), "moving")
        finally:
            await active.close()
            await reference_active.close()
            await store.close()
        return moved, stayed, final, store.lost

    moved, stayed, final, lost = asyncio.run(go())
    assert [m.sequence for m in moved] == list(range(1, 8))
    assert final.items == tuple(items)
    # The same clicks on one worker give the same lists: a stale start was never answered from.
    assert [(m.item_ids, m.scores) for m in moved] == [(s.item_ids, s.scores) for s in stayed]
    assert lost == 3  # clicks 4, 5 and 7 started from a stale entry and were computed again


def test_a_visit_deleted_or_expired_elsewhere_is_not_brought_back(settings_for, redis_url):
    settings = settings_for(redis_url, session_ttl_s=0.3)

    async def go():
        store, active, (a, b) = _workers(settings, 2)
        await active.open(ModelChoice("shop", "v1", "gru"))
        try:
            await _click(a, "erased", "sku-000011")
            await _click(a, "erased", "sku-000222")
            await b.forget("erased", 1.0, Timing())  # a still holds the visit's last write
            after_delete = await _click(a, "erased", "sku-000333")
            current = await a.current("erased", 5, True, 1.0, Timing())
            await _click(a, "expiring", "sku-000011")
            await asyncio.sleep(0.45)  # past the TTL: Redis has dropped the key (a stale entry would fail its check-and-set)
            after_ttl = await _click(a, "expiring", "sku-000222")
        finally:
            await active.close()
            await store.close()
        return after_delete, current, after_ttl

    after_delete, current, after_ttl = asyncio.run(go())
    assert after_delete.sequence == 1  # a new visit, not the erased one's third click
    assert current.sequence == 1
    assert after_ttl.sequence == 1
