"""SIGTERM under load: requests in flight complete, nothing acknowledged is lost, no 5xx.

`cairn serve` (one worker, a real redis-server) takes clicks from 8 concurrent visitors; SIGTERM
arrives mid-stream. Every click answered `recorded: yes` must be in Redis afterwards; a click sent
after the listener closed fails to connect (the client knows it was not taken); none gets a 5xx.
"""

from __future__ import annotations

import os
import signal
import threading
import time

import httpx
import redis

from service.store.state import decode
from tests._support.servers import RedisProcess, free_port, serve_shop

VISITORS = 8


def test_sigterm_under_load_finishes_in_flight_clicks_and_loses_none(model_store, tmp_path):
    store = RedisProcess(free_port()).start()
    port = free_port()
    url = f"http://127.0.0.1:{port}"
    prefix = f"gs{os.getpid()}:"
    acknowledged: dict[str, int] = {}  # session -> highest sequence answered recorded yes
    statuses: list[int] = []
    stop = threading.Event()
    lock = threading.Lock()

    def visitor(v: int) -> None:
        session = f"gs-{v}"
        with httpx.Client(base_url=url, timeout=10) as c:
            for n in range(10_000):  # bounded; the server going away ends it long before
                if stop.is_set():
                    return
                try:
                    r = c.post(f"/v1/sessions/{session}/clicks", json={"item_id": f"sku-{(v * 31 + n) % 400:06d}", "event_id": f"{v}-{n}"})
                except httpx.TransportError:
                    return  # the listener closed: this click was never taken
                with lock:
                    statuses.append(r.status_code)
                    answer = r.json()
                    if r.status_code == 200 and answer["recorded"] == "yes":
                        acknowledged[session] = max(acknowledged.get(session, 0), answer["sequence"])

    try:
        with serve_shop(tmp_path, model_store, store.url, port, CAIRN_REDIS_PREFIX=prefix) as proc:
            threads = [threading.Thread(target=visitor, args=(v,)) for v in range(VISITORS)]
            for t in threads:
                t.start()
            time.sleep(1.5)  # load flowing
            proc.send_signal(signal.SIGTERM)
            rc = proc.wait(timeout=15)
            stop.set()
            for t in threads:
                t.join(timeout=15)
        assert rc in (0, -signal.SIGTERM)
        assert statuses and all(s < 500 for s in statuses), sorted(set(statuses))
        assert sum(1 for s in statuses if s == 200) > 50  # it was under load when the signal came
        client = redis.Redis.from_url(store.url)
        try:
            for session, sequence in acknowledged.items():
                raw = client.get(f"{prefix}s:{session}")
                assert raw is not None and decode(raw, session).sequence >= sequence, (session, sequence)
        finally:
            client.close()
    finally:
        store.stop()
