"""200 concurrent clicks across 20 visits, served by `cairn serve --workers 2` sharing one Redis:
every click is recorded exactly once, and a click sent twice (same event_id) is applied once.
"""

from __future__ import annotations

import asyncio
import os
import random
import re
import time
from collections import Counter, defaultdict

import httpx
import pytest
import redis as redis_sync

from service.store.state import decode
from tests._support.servers import cairn_serve, free_port

SESSIONS, CLICKS_EACH, RESENT = 20, 10, 40


@pytest.fixture()
def two_workers(model_store, shared_redis, tmp_path, token):
    port = free_port()
    prefix = f"x{os.getpid()}:"
    url = f"http://127.0.0.1:{port}"
    pids: set[str] = set()

    def both_up() -> bool:  # both workers up: each answers /metrics with its own pid
        with httpx.Client(base_url=url, timeout=2, limits=httpx.Limits(max_keepalive_connections=0)) as c:
            for _ in range(20):
                pids.add(re.search(r'cairn_worker_info\{pid="(\d+)"\}', c.get("/metrics").text).group(1))
        return len(pids) >= 2

    with cairn_serve(
        ["--workers", "2", "--port", str(port)], tmp_path, both_up, "cairn serve --workers 2", ignore=(httpx.TransportError,),
        CAIRN_SESSION_STORE=shared_redis.url, CAIRN_ARTIFACTS=str(model_store), CAIRN_ARTIFACT_NAME="shop", CAIRN_ARTIFACT_VERSION="v1",
        CAIRN_ADMIN_TOKEN=token, CAIRN_REDIS_PREFIX=prefix, CAIRN_LOG_LEVEL="info", CAIRN_ACCESS_LOG="true",
    ):  # fmt: skip
        yield url, prefix


def clicks_in_one_scrape(url: str) -> int:
    """Clicks answered 200 by the whole service, as one scrape of either worker reports them."""
    text = httpx.get(f"{url}/metrics", timeout=5).text
    return int(sum(
        float(line.rsplit(" ", 1)[1]) for line in text.splitlines()
        if line.startswith("cairn_http_requests_total{") and "/clicks" in line and 'status="200"' in line
    ))  # fmt: skip


def clicks_by_worker(log: str) -> Counter:
    """pid -> clicks that worker answered, from uvicorn's access log."""
    return Counter(re.findall(r'uvicorn\.access\[(\d+)\]: .*"POST /v1/sessions/[^/]+/clicks HTTP/1\.1" 200', log))


def test_every_click_recorded_exactly_once_across_two_workers(two_workers, shared_redis, sid, tmp_path):
    url, prefix = two_workers
    sessions = [sid("once") for _ in range(SESSIONS)]
    clicks = [(s, f"sku-{(31 * k + 7 * n) % 400:06d}", f"ev-{k}-{n}") for k, s in enumerate(sessions) for n in range(CLICKS_EACH)]
    rng = random.Random(5)
    resent = rng.sample(clicks, RESENT)  # a client retrying: same click, same event_id
    requests = clicks + resent
    rng.shuffle(requests)

    async def fire() -> list[tuple[str, str, int, dict]]:
        limits = httpx.Limits(max_connections=64)  # many connections: the kernel spreads them over both workers
        async with httpx.AsyncClient(base_url=url, timeout=30, limits=limits) as c:
            async def one(session: str, item: str, event: str):
                # A generous budget: this test is about exactly-once, not about the deadline.
                r = await c.post(f"/v1/sessions/{session}/clicks", json={"item_id": item, "event_id": event, "budget_ms": 10_000})
                return session, event, r.status_code, r.json()

            return await asyncio.gather(*(one(*req) for req in requests))

    replies = asyncio.run(fire())
    assert {status for _, _, status, _ in replies} == {200}
    applied: dict[str, list[int]] = defaultdict(list)
    per_event = Counter()
    for session, event, _, answer in replies:
        assert answer["fallback_reason"] is None or answer["fallback_reason"] in ("budget", "deadline"), answer
        if not answer["duplicate"]:
            applied[session].append(answer["sequence"])
            per_event[event] += 1
    assert all(per_event[event] == 1 for _, _, event in clicks)  # each event applied once, resent or not
    assert sum(per_event.values()) == SESSIONS * CLICKS_EACH
    for s in sessions:
        assert sorted(applied[s]) == list(range(1, CLICKS_EACH + 1)), (s, sorted(applied[s]))
    duplicates = sum(answer["duplicate"] for _, _, _, answer in replies)
    assert duplicates == RESENT
    assert clicks_in_one_scrape(url) == len(requests)  # one scrape counts both workers' clicks
    time.sleep(0.3)  # access log lines are written as the answers go out
    served = clicks_by_worker((tmp_path / "serve.log").read_text())
    assert len(served) == 2 and sum(served.values()) == len(requests) and min(served.values()) > 0, served
    plain = redis_sync.Redis.from_url(shared_redis.url)
    for k, s in enumerate(sessions):
        state = decode(plain.get(f"{prefix}s:{s}"), s)
        assert state.sequence == CLICKS_EACH
        assert sorted(state.event_ids) == sorted(f"ev-{k}-{n}" for n in range(CLICKS_EACH))
