"""A `cairn serve` process killed (SIGKILL) and started again, with a folder sink and a Redis
stream sink: every event the sink acknowledged before the kill is still there, the loss is at
most what was buffered and not yet flushed, and the restarted process goes on writing (a file of
its own; the same stream)."""

from __future__ import annotations

import os
import re
import signal
import time
from pathlib import Path

import httpx
import pytest

from offline.online.event_source import read_events
from tests._support.servers import cairn_serve, free_port


def _written(url: str) -> int:
    text = httpx.get(f"{url}/metrics", timeout=5).text
    m = re.search(r"^cairn_events_written_total (\d+)", text, re.M)
    return int(m.group(1)) if m else 0


def _click(c: httpx.Client, session: str, item: str) -> None:
    assert c.post(f"/v1/sessions/{session}/clicks", json={"item_id": item, "count": 3}).status_code == 200


@pytest.mark.parametrize("sink", ["folder", "redis"])
def test_kill_loses_at_most_the_unflushed_buffer(sink: str, model_store: Path, redis_url: str, tmp_path: Path, sid) -> None:
    target = str(tmp_path / "events") if sink == "folder" else redis_url
    prefix = f"k{os.getpid()}{sink}:"
    port = free_port()
    url = f"http://127.0.0.1:{port}"
    env = dict(
        CAIRN_ARTIFACTS=str(model_store), CAIRN_ARTIFACT_NAME="shop", CAIRN_ARTIFACT_VERSION="v1",
        CAIRN_EVENTS=target, CAIRN_EVENTS_FLUSH_S="0.5", CAIRN_REDIS_PREFIX=prefix, CAIRN_LOG_LEVEL="warning",
    )  # fmt: skip

    def ready() -> bool:
        return httpx.get(f"{url}/readyz", timeout=2).status_code == 200

    acknowledged, unflushed, after = sid("ack"), sid("late"), sid("after")
    with cairn_serve(["--port", str(port)], tmp_path, ready, "cairn serve", ignore=(httpx.TransportError,), **env) as proc:
        with httpx.Client(base_url=url, timeout=10) as c:
            for n in range(20):
                _click(c, acknowledged, f"sku-{n:06d}")
            for _ in range(100):  # the writer flushes every 0.5 s
                if _written(url) >= 20:
                    break
                time.sleep(0.05)
            assert _written(url) == 20
            for n in range(10):
                _click(c, unflushed, f"sku-{n:06d}")
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=10)

    with cairn_serve(["--port", str(port)], tmp_path, ready, "cairn serve (restarted)", ignore=(httpx.TransportError,), **env):
        with httpx.Client(base_url=url, timeout=10) as c:
            for n in range(7):
                _click(c, after, f"sku-{n:06d}")
    # the second process was stopped with SIGTERM: its shutdown flushed

    batch = read_events(target, prefix)
    per_visit: dict[str, int] = {}
    for e in batch.events:
        per_visit[e["session_id"]] = per_visit.get(e["session_id"], 0) + 1
    assert per_visit.get(acknowledged) == 20  # acknowledged before the kill: all there
    assert per_visit.get(after) == 7
    assert 0 <= per_visit.get(unflushed, 0) <= 10  # the unflushed buffer: some, all or none of it
    assert batch.skipped <= 1
    if sink == "folder":
        assert len(batch.files) == 2  # one file per process
