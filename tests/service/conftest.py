"""Fixtures of the service tests: small random artifacts, a real redis-server, real uvicorn servers.

Servers run in a thread of the test process (one uvicorn, real sockets, real HTTP) or, for the
multi-worker test, as a `cairn serve` subprocess. redis-server is started here on a free loopback
port without persistence and stopped at teardown; the system Redis on 6379 is never touched.
The servers themselves are tests/_servers.py's; `sid`, `token` and the clean environment come from
tests/conftest.py.
"""

from __future__ import annotations

import contextlib
import os
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest

from service.artifacts.format import load_artifact
from service.config import Settings
from service.runtime.onnx_step import OnnxStep
from tests._support.servers import RedisProcess, RunningServer, free_port, serve_in_thread, shop_settings

N_ITEMS = 500
HIDDEN = 32


@pytest.fixture(scope="session")
def model_store(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """shop/v1 (with the clustered index) and shop/v2: same ids, different random weights; v0-broken fails verification."""
    from offline.export.artifact_writer import write_random_artifact
    from service.artifacts.item_vectors import PRECISIONS

    store = tmp_path_factory.mktemp("model_store")
    write_random_artifact(store, "shop", "v1", n_items=N_ITEMS, hidden_size=HIDDEN, seed=0, clusters=True, precisions=PRECISIONS)
    write_random_artifact(store, "shop", "v2", n_items=N_ITEMS, hidden_size=HIDDEN, seed=1)
    broken = write_random_artifact(store, "shop", "v0-broken", n_items=N_ITEMS, hidden_size=HIDDEN, seed=2)
    with open(broken / "popularity.npy", "r+b") as f:  # one byte changed after export: the checksum no longer matches
        f.seek(-1, os.SEEK_END)
        last = f.read(1)
        f.seek(-1, os.SEEK_END)
        f.write(bytes([last[0] ^ 0xFF]))
    return store


class Offline:
    """What the exported model computes for a click sequence, straight from OnnxStep (no service code)."""

    def __init__(self, path: Path) -> None:
        self.artifact = load_artifact(path)
        self.step = OnnxStep(self.artifact.step_graph)

    def top(self, clicks: list[str], count: int = 10, exclude_seen: bool = True) -> tuple[list[str], list[float]]:
        a = self.artifact
        hidden = self.step.zero_hidden(1)  # [L, 1, H]
        ranked = scores = None
        for item in clicks:
            hidden, ranked, scores = self.step.run(np.array([a.item_index[item]], dtype=np.int64), hidden, a.n_items)
        assert ranked is not None
        seen = set(clicks) if exclude_seen else set()
        pairs = [(a.item_ids[i], float(s)) for i, s in zip(ranked[0], scores[0]) if a.item_ids[i] not in seen][:count]
        return [p[0] for p in pairs], [p[1] for p in pairs]


@pytest.fixture(scope="session")
def offline(model_store: Path) -> dict[str, Offline]:
    return {v: Offline(model_store / "shop" / v) for v in ("v1", "v2")}


@pytest.fixture(scope="session")
def redis_url() -> Iterator[str]:
    """A redis-server of our own on a free loopback port, no persistence; stopped at teardown."""
    redis = RedisProcess(free_port()).start()
    yield redis.url
    redis.stop()


def make_settings(model_store: Path, store: str = "memory", **overrides: object) -> Settings:
    """Each server gets its own key prefix in the shared redis-server, so tests never see each other's keys."""
    return shop_settings(model_store, store, tag="t", **overrides)


@pytest.fixture(scope="module", params=["memory", "redis"])
def server(request: pytest.FixtureRequest, model_store: Path) -> Iterator[RunningServer]:
    """A server with shop/v1 and the GRU, against each store in turn."""
    store = request.getfixturevalue("redis_url") if request.param == "redis" else "memory"
    with serve_in_thread(make_settings(model_store, store)) as running:
        yield running


@pytest.fixture()
def fresh_server(model_store: Path, request: pytest.FixtureRequest) -> Iterator:
    """Start servers with settings of a test's own: `fresh_server("redis", session_ttl_s=0.3)`."""
    stack = contextlib.ExitStack()

    def start(store: str = "memory", **overrides: object) -> RunningServer:
        url = request.getfixturevalue("redis_url") if store == "redis" else "memory"
        return stack.enter_context(serve_in_thread(make_settings(model_store, url, **overrides)))

    with stack:
        yield start


@pytest.fixture(scope="session")
def settings_for(model_store: Path):
    """`settings_for("redis://...", session_ttl_s=0.3)`: test settings on the session's model store."""

    def build(store: str = "memory", **overrides: object) -> Settings:
        return make_settings(model_store, store, **overrides)

    return build


@pytest.fixture(scope="session")
def serve():
    """The context manager that runs a server in a thread, for tests with servers of their own."""
    return serve_in_thread
