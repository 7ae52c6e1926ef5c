"""`cairn serve --workers 2` as a subprocess sharing a real Redis: one visit across both workers,
and a model switch through one worker that the other follows within a second."""

from __future__ import annotations

import os
import re
import signal
import time
from collections import Counter

import httpx
import pytest

from tests._support.servers import cairn_serve, free_port, serve_shop

CLICKS = [f"sku-{i:06d}" for i in (5, 50, 150, 250, 350, 450, 45, 145, 245, 345, 445, 40)]


def fresh(url: str) -> httpx.Client:
    # No keep-alive: every request is a new connection, so the kernel hands it to either worker.
    return httpx.Client(base_url=url, timeout=10, limits=httpx.Limits(max_keepalive_connections=0))


def worker_of_each_scrape(url: str, want: int = 2, tries: int = 200) -> dict[str, str]:
    """pid -> that worker's /metrics text, scraping until `want` workers answered."""
    seen: dict[str, str] = {}
    with fresh(url) as c:
        for _ in range(tries):
            text = c.get("/metrics").text
            pid = re.search(r'cairn_worker_info\{pid="(\d+)"\} 1', text).group(1)
            seen[pid] = text
            if len(seen) >= want:
                break
    return seen


def clicks_served(metrics_text: str) -> int:
    """Clicks answered 200, as one scrape reports them (label order as the exposition writes it)."""
    total = 0.0
    for line in metrics_text.splitlines():
        if line.startswith("cairn_http_requests_total{") and 'route="/v1/sessions/{session_id}/clicks"' in line and 'status="200"' in line:
            total += float(line.rsplit(" ", 1)[1])
    return int(total)


def clicks_in_access_log(log: str, session: str) -> Counter:
    """pid -> the visit's clicks that worker answered, from uvicorn's access log lines."""
    pattern = re.compile(rf"uvicorn\.access\[(\d+)\]: .*\"POST /v1/sessions/{re.escape(session)}/clicks HTTP/1\.1\" 200")
    return Counter(m.group(1) for m in pattern.finditer(log))


@pytest.fixture()
def two_workers(model_store, redis_url, tmp_path, token):
    port = free_port()
    url = f"http://127.0.0.1:{port}"
    with serve_shop(
        tmp_path, model_store, redis_url, port, workers=2, CAIRN_ADMIN_TOKEN=token, CAIRN_REDIS_PREFIX=f"w{os.getpid()}:",
        CAIRN_LOG_LEVEL="info", CAIRN_ACCESS_LOG="true",  # the access log says which worker answered each click
    ):  # fmt: skip
        yield url


def test_two_workers_share_one_visit_and_follow_a_switch(two_workers, offline, sid, token, tmp_path):
    url = two_workers
    # The kernel hands each new connection to either worker; now and then it hands all eight of a
    # visit to one, which proves nothing either way: then the test takes another visit (3 at most).
    for attempt in range(3):
        session = sid("w")
        with fresh(url) as c:
            before = clicks_served(c.get("/metrics").text)
            for n, item in enumerate(CLICKS[:8], start=1):
                answer = c.post(f"/v1/sessions/{session}/clicks", json={"item_id": item, "count": 6}).json()
                assert answer["sequence"] == n and answer["served_by"] == "gru"
                assert [i["item_id"] for i in answer["items"]] == offline["v1"].top(CLICKS[:n], count=6)[0]
        # One scrape, of whichever worker answers it, counts the clicks both workers answered.
        for pid, text in worker_of_each_scrape(url).items():
            assert clicks_served(text) - before == 8, (pid, clicks_served(text), before)
        time.sleep(0.3)  # the access log lines are written as the answers go out
        served = clicks_in_access_log((tmp_path / "serve.log").read_text(), session)
        assert sum(served.values()) == 8, served
        if len(served) == 2:
            break
    assert len(served) == 2, f"one worker served the whole visit, {attempt + 1} visits in a row: {served}"

    with fresh(url) as c:
        r = c.put("/v1/serving", json={"name": "shop", "version": "v2"}, headers={"authorization": f"Bearer {token}"})
        assert r.status_code == 200, r.text
        switched_at = time.monotonic()
        # Both workers serve v2 within a second (they poll the shared choice every 0.5 s).
        following: dict[str, str] = {}
        while time.monotonic() - switched_at < 1.0:
            ready = c.get("/readyz").json()
            following[str(ready["pid"])] = ready["active"]["version"]
            if len(following) == 2 and set(following.values()) == {"v2"}:
                break
        assert len(following) == 2 and set(following.values()) == {"v2"}, following
        for n, item in enumerate(CLICKS[8:], start=9):
            answer = c.post(f"/v1/sessions/{session}/clicks", json={"item_id": item, "count": 6}).json()
            assert answer["sequence"] == n and answer["artifact"] == "shop/v2"
            assert [i["item_id"] for i in answer["items"]] == offline["v2"].top(CLICKS[:n], count=6)[0]


def test_sigterm_stops_a_worker_cleanly_and_promptly(model_store, redis_url, tmp_path, sid):
    # With Redis the worker runs a background task that polls the shared model choice through Redis;
    # shutdown must stop it even mid-call (service/runtime/tasks.py), then exit 0.
    port = free_port()
    url = f"http://127.0.0.1:{port}"
    with cairn_serve(
        ["--port", str(port)],
        tmp_path,
        lambda: httpx.get(f"{url}/readyz", timeout=2).status_code == 200,
        "cairn serve",
        ignore=(httpx.TransportError,),
        CAIRN_SESSION_STORE=redis_url,
        CAIRN_ARTIFACTS=str(model_store),
        CAIRN_ARTIFACT_NAME="shop",
        CAIRN_MODEL_POLL_S="0.05",  # the smallest allowed: the follower calls Redis often
        CAIRN_REDIS_PREFIX=f"t{os.getpid()}:",
        CAIRN_LOG_LEVEL="info",
    ) as proc:
        with fresh(url) as c:
            for item in CLICKS[:3]:
                assert c.post(f"/v1/sessions/{sid('term')}/clicks", json={"item_id": item}).status_code == 200
        t0 = time.monotonic()
        proc.terminate()
        rc = proc.wait(timeout=15)
        took = time.monotonic() - t0
    log = (tmp_path / "serve.log").read_text()
    # uvicorn re-raises the signal once it has shut down, so the exit status is SIGTERM's own.
    assert rc in (0, -signal.SIGTERM), log
    assert took < 5, (took, log)  # no request in flight: nothing to wait for, well inside a 30 s grace period (common practice)
    assert "Application shutdown complete" in log and "Finished server process" in log and "Traceback" not in log


def test_every_worker_logs_with_time_level_and_its_info_lines(model_store, redis_url, tmp_path):
    port = free_port()
    url = f"http://127.0.0.1:{port}"
    with serve_shop(tmp_path, model_store, redis_url, port, workers=2, CAIRN_REDIS_PREFIX=f"wl{os.getpid()}:", CAIRN_LOG_LEVEL="info"):
        pids = set(worker_of_each_scrape(url))
    log = (tmp_path / "serve.log").read_text()
    # "2026-12-03 07:40:01,123 INFO cairn.service[4242]: ready: shop/v1 (gru), ..." from each worker.
    line = re.compile(r"^\d{4}-\d\d-\d\d \d\d:\d\d:\d\d,\d{3} INFO cairn\.service\[(\d+)\]: ready: shop/v1", re.M)
    assert pids <= set(line.findall(log)), log[-3000:]


def test_workers_agree_again_after_the_store_forgets_the_switch_and_a_worker_restarts(model_store, tmp_path, token, sid):
    from tests._support.servers import RedisProcess

    redis = RedisProcess(free_port()).start()
    port = free_port()
    url = f"http://127.0.0.1:{port}"
    try:
        with serve_shop(tmp_path, model_store, redis.url, port, workers=2, CAIRN_ADMIN_TOKEN=token, CAIRN_MODEL_POLL_S="0.2"):
            with fresh(url) as c:
                assert c.put("/v1/serving", json={"name": "shop", "version": "v2"}, headers={"authorization": f"Bearer {token}"}).status_code == 200
            assert serving_by_worker(url, until={"v2"}) == {"v2"}
            old_pids = set(worker_of_each_scrape(url))
            redis.kill()  # no persistence: the shared choice is gone ...
            redis.start()
            os.kill(int(min(old_pids)), signal.SIGKILL)  # ... and a worker restarts on its configured v1
            deadline = time.monotonic() + 20
            while not (set(worker_of_each_scrape(url, tries=60)) - old_pids):
                assert time.monotonic() < deadline, "uvicorn did not restart the killed worker"
                time.sleep(0.2)
            # Every worker serves the newest switch again within seconds.
            assert serving_by_worker(url, until={"v2"}, within_s=5.0) == {"v2"}
            with fresh(url) as c:
                answers = [c.post(f"/v1/sessions/{sid('agree')}/clicks", json={"item_id": "sku-000007"}).json() for _ in range(30)]
                listing = c.get("/v1/artifacts").json()
            assert {a["artifact"] for a in answers} == {"shop/v2"}
            workers = {w["worker"].rsplit(":", 1)[1]: w["artifact"] for w in listing["workers"]}
            assert set(workers.values()) == {"shop/v2"} and (set(workers) - {str(p) for p in old_pids}), listing["workers"]
    finally:
        redis.stop()


def serving_by_worker(url: str, until: set[str], within_s: float = 3.0) -> set[str]:
    """The versions the last 20 answers of /readyz came with (new connections, so both workers
    answer), polled until they are `until` from two workers or `within_s` passes."""
    deadline = time.monotonic() + within_s
    recent: list[tuple[str, str]] = []
    with fresh(url) as c:
        while True:
            ready = c.get("/readyz").json()
            recent = [*recent, (str(ready["pid"]), ready["active"]["version"])][-20:]
            versions = {v for _, v in recent}
            if len(recent) == 20 and versions == until and len({p for p, _ in recent}) >= 2:
                return versions
            if time.monotonic() > deadline:
                return versions
            time.sleep(0.02)
