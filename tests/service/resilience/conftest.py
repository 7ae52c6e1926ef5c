"""Fixtures of the fault tests: small artifacts (good and corrupt), redis-server processes the tests
may kill and restart, a three-master Redis Cluster, servers in a thread with injected faults.

Everything is real: redis-server processes on free loopback ports (never the system Redis on 6379),
uvicorn serving real HTTP, `cairn serve --workers 2` as a subprocess. Faults in the model are a
small class passed to the app factory (`ModelFault.wrap`), never a patch. The redis-server
processes and servers themselves are tests/_servers.py's; `sid`, `token` and the clean environment
come from tests/conftest.py.
"""

from __future__ import annotations

import asyncio
import contextlib
import re
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from types import SimpleNamespace

import httpx
import numpy as np
import pytest

from service.artifacts.format import load_artifact
from service.config import Settings
from service.runtime.onnx_step import OnnxStep
from tests._support.faults import ModelFault
from tests._support.servers import RedisProcess, RunningServer, free_port, serve_in_thread, shop_settings

N_ITEMS = 400
HIDDEN = 24


# -- artifacts --------------------------------------------------------------------------------------

CORRUPT = ("bad-byte", "bad-truncated", "bad-missing", "bad-format")


@pytest.fixture(scope="session")
def model_store(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """shop/v1 and shop/v2 (good, different weights) and four artifacts that must be refused:

    bad-byte       one byte of step.onnx changed after export (its checksum no longer matches);
    bad-truncated  step.onnx cut to half, written and sealed as a whole artifact (checksums match,
                   so only opening the graph can catch it);
    bad-missing    neighbours.npz deleted;
    bad-format     a manifest of another format version.
    """
    from service.artifacts.format import write_artifact
    from offline.export.artifact_writer import write_random_artifact

    store = tmp_path_factory.mktemp("model_store")
    write_random_artifact(store, "shop", "v1", n_items=N_ITEMS, hidden_size=HIDDEN, seed=0)
    write_random_artifact(store, "shop", "v2", n_items=N_ITEMS, hidden_size=HIDDEN, seed=1)
    byte = write_random_artifact(store, "shop", "bad-byte", n_items=N_ITEMS, hidden_size=HIDDEN, seed=2)
    with open(byte / "step.onnx", "r+b") as f:
        f.seek(100)
        b = f.read(1)
        f.seek(100)
        f.write(bytes([b[0] ^ 0x01]))
    good = load_artifact(store / "shop" / "v1")
    graph = (store / "shop" / "v1" / "step.onnx").read_bytes()
    write_artifact(
        store, "shop", "bad-truncated", graph[: len(graph) // 2], good.item_ids,
        good.neighbour_items, good.neighbour_scores, good.popularity, {"model": {"n_items": N_ITEMS}},
    )  # fmt: skip
    missing = write_random_artifact(store, "shop", "bad-missing", n_items=N_ITEMS, hidden_size=HIDDEN, seed=3)
    (missing / "neighbours.npz").unlink()
    fmt = write_random_artifact(store, "shop", "bad-format", n_items=N_ITEMS, hidden_size=HIDDEN, seed=4)
    manifest = (fmt / "manifest.json").read_text(encoding="utf-8")
    (fmt / "manifest.json").write_text(manifest.replace('"cairn-artifact/1"', '"cairn-artifact/2"'), encoding="utf-8")
    return store


class Offline:
    """What the exported model computes for a click sequence, straight from OnnxStep (no service code)."""

    def __init__(self, path: Path) -> None:
        self.artifact = load_artifact(path)
        self.step = OnnxStep(self.artifact.step_graph)

    def top(self, clicks: list[str], count: int = 10, exclude_seen: bool = True) -> list[str]:
        a = self.artifact
        hidden = self.step.zero_hidden(1)  # [L, 1, H]
        ranked = None
        for item in clicks:
            hidden, ranked, _ = self.step.run(np.array([a.item_index[item]], dtype=np.int64), hidden, a.n_items)
        seen = set(clicks) if exclude_seen else set()
        return [a.item_ids[i] for i in ranked[0] if a.item_ids[i] not in seen][:count]

    def neighbours(self, item: str, count: int = 10, seen: tuple[str, ...] = ()) -> list[str]:
        """The artifact's neighbour row of `item`, seen items left out: what the fallback must answer."""
        a = self.artifact
        excluded = {item, *seen}
        return [a.item_ids[i] for i in a.neighbour_items[a.item_index[item]] if i >= 0 and a.item_ids[i] not in excluded][:count]


@pytest.fixture(scope="session")
def offline(model_store: Path) -> dict[str, Offline]:
    return {v: Offline(model_store / "shop" / v) for v in ("v1", "v2")}


# -- injected model faults --------------------------------------------------------------------------


# -- redis-server processes -------------------------------------------------------------------------


@pytest.fixture(scope="session")
def shared_redis() -> Iterator[RedisProcess]:
    """One redis-server for the tests that do not kill theirs; each server uses its own key prefix."""
    redis = RedisProcess(free_port()).start()
    yield redis
    redis.kill()


@pytest.fixture()
def own_redis() -> Iterator[RedisProcess]:
    """A redis-server for this test alone (it may kill and restart it)."""
    redis = RedisProcess(free_port()).start()
    yield redis
    redis.kill()


# -- servers ----------------------------------------------------------------------------------------


def make_settings(model_store: Path, store: str = "memory", **overrides: object) -> Settings:
    return shop_settings(model_store, store, tag="r", **{"log_level": "warning", **overrides})


@pytest.fixture()
def start_server(model_store: Path) -> Iterator:
    """`start_server(store_url, wrap_model=fault.wrap, model_breaker_min_calls=5, ...)`: stopped after the test.

    `wrap_store` wraps the store the settings name in a class of the test's (a slow store).
    """
    stack = contextlib.ExitStack()

    def start(store: str = "memory", wrap_model=None, wrap_store=None, **overrides: object) -> RunningServer:
        from service.store.base import open_store

        settings = make_settings(model_store, store, **overrides)
        session_store = None if wrap_store is None else wrap_store(open_store(settings))
        return stack.enter_context(serve_in_thread(settings, wrap_model=wrap_model, store=session_store))

    with stack:
        yield start


def metric(text: str, name: str, **labels: str) -> float:
    """The value of one sample in a Prometheus text exposition (0 when absent); labels in any order."""
    for line in text.splitlines():
        if not line.startswith(name) or line.startswith("#"):
            continue
        head, _, value = line.rpartition(" ")
        sample, _, label_text = head.partition("{")
        if sample != name:
            continue
        found = dict(re.findall(r'([a-zA-Z_][a-zA-Z0-9_]*)="((?:[^"\\]|\\.)*)"', label_text))
        if found == labels:
            return float(value)
    return 0.0


def ids(answer: dict) -> list[str]:
    return [i["item_id"] for i in answer["items"]]


class Load:
    """Clicks from `workers` concurrent visitors in a background thread until stopped; every reply kept.

    Each visitor keeps clicking its own session with items from `items`, one request at a time, as a
    storefront backend would for a busy visit. Replies: (sent at, seconds, status, JSON body or None).
    """

    def __init__(self, url: str, sessions: list[str], items: list[str], budget_ms: int | None = None, pause_s: float = 0.0) -> None:
        self.url, self.sessions, self.items, self.budget_ms, self.pause_s = url, sessions, items, budget_ms, pause_s
        self.replies: list[tuple[float, float, int, dict | None, str, str]] = []  # (t0, seconds, status, body, session, item)
        self._stop = threading.Event()
        self._thread = threading.Thread(target=lambda: asyncio.run(self._run()), daemon=True)

    def __enter__(self) -> Load:
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self._thread.join(timeout=30)

    async def _visitor(self, client: httpx.AsyncClient, session: str, offset: int) -> None:
        n = offset
        while not self._stop.is_set():
            item = self.items[n % len(self.items)]
            n += 1
            body: dict[str, object] = {"item_id": item, "count": 5}
            if self.budget_ms is not None:
                body["budget_ms"] = self.budget_ms
            t0 = time.monotonic()
            try:
                r = await client.post(f"/v1/sessions/{session}/clicks", json=body)
                status, payload = r.status_code, (r.json() if r.headers.get("content-type", "").startswith("application/json") else None)
            except httpx.HTTPError as exc:
                status, payload = -1, {"transport_error": type(exc).__name__}
            self.replies.append((t0, time.monotonic() - t0, status, payload, session, item))
            if self.pause_s:
                await asyncio.sleep(self.pause_s)

    async def _run(self) -> None:
        limits = httpx.Limits(max_connections=len(self.sessions))
        async with httpx.AsyncClient(base_url=self.url, timeout=10, limits=limits) as client:
            await asyncio.gather(*(self._visitor(client, s, 7 * k) for k, s in enumerate(self.sessions)))

    def between(self, start: float, end: float) -> list[tuple]:
        return [r for r in self.replies if start <= r[0] < end]


def auth(token: str) -> dict[str, str]:
    return {"authorization": f"Bearer {token}"}


@pytest.fixture(scope="session")
def kit() -> SimpleNamespace:
    """The helpers above, for test modules (test files are not importable modules here)."""
    return SimpleNamespace(ModelFault=ModelFault, Load=Load, metric=metric, ids=ids, auth=auth, free_port=free_port, RedisProcess=RedisProcess)
