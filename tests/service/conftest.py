"""Fixtures of the service tests: small random artifacts, a real redis-server, real uvicorn servers.

Servers run in a thread of the test process (one uvicorn, real sockets, real HTTP) or, for the
multi-worker test, as a `cairn serve` subprocess. redis-server is started here on a free loopback
port without persistence and stopped at teardown; the system Redis on 6379 is never touched.
"""

from __future__ import annotations

import contextlib
import itertools
import os
import shutil
import socket
import subprocess
import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import httpx
import numpy as np
import pytest
import uvicorn

from service.artifacts import load_artifact
from service.config import ENV_PREFIX, Settings
from service.runtime.onnx_step import OnnxStep

N_ITEMS = 500
HIDDEN = 32
TOKEN = "test-admin-token-0123456789"
_prefixes = itertools.count()


@pytest.fixture(scope="session", autouse=True)
def _clean_environment() -> Iterator[None]:
    """Settings read CAIRN_ variables: the tests start from none, whatever the shell has."""
    saved = {k: v for k, v in os.environ.items() if k.startswith(ENV_PREFIX)}
    for key in saved:
        del os.environ[key]
    yield
    for key in [k for k in os.environ if k.startswith(ENV_PREFIX)]:
        del os.environ[key]
    os.environ.update(saved)


@pytest.fixture(scope="session")
def model_store(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """shop/v1 and shop/v2: same ids, different random weights; v0-broken fails verification."""
    from service.offline.export import write_random_artifact

    store = tmp_path_factory.mktemp("model_store")
    write_random_artifact(store, "shop", "v1", n_items=N_ITEMS, hidden_size=HIDDEN, seed=0)
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


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture(scope="session")
def redis_url() -> Iterator[str]:
    """A redis-server of our own on a free loopback port, no persistence; stopped at teardown."""
    binary = shutil.which("redis-server")
    if binary is None:
        pytest.fail("redis-server is not installed: the service tests need it (`make redis-server` installs it)")
    port = free_port()
    assert port != 6379
    proc = subprocess.Popen(
        [binary, "--port", str(port), "--bind", "127.0.0.1", "--save", "", "--appendonly", "no"],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.STDOUT,
    )
    deadline = time.monotonic() + 10
    while True:
        with contextlib.suppress(OSError), socket.create_connection(("127.0.0.1", port), timeout=0.2) as s:
            s.sendall(b"PING\r\n")
            if s.recv(16).startswith(b"+PONG"):
                break
        if proc.poll() is not None or time.monotonic() > deadline:
            proc.kill()
            pytest.fail(f"redis-server did not start on port {port}")
        time.sleep(0.05)
    yield f"redis://127.0.0.1:{port}/0"
    proc.terminate()
    try:
        proc.wait(timeout=5)
    except subprocess.TimeoutExpired:
        proc.kill()


def unique_prefix() -> str:
    """Each server gets its own key prefix in the shared redis-server, so tests never see each other's keys."""
    return f"t{os.getpid()}-{next(_prefixes)}:"


def make_settings(model_store: Path, store: str = "memory", **overrides: object) -> Settings:
    base: dict[str, object] = {
        "model_store": model_store,
        "model_name": "shop",
        "model_version": "v1",
        "store": store,
        "redis_prefix": unique_prefix(),
        "admin_token": TOKEN,
    }
    base.update(overrides)
    return Settings(**base)


@dataclass
class RunningServer:
    url: str
    settings: Settings
    app: object

    def client(self, **kwargs: object) -> httpx.Client:
        return httpx.Client(base_url=self.url, timeout=10, **kwargs)


@contextlib.contextmanager
def serve_in_thread(settings: Settings) -> Iterator[RunningServer]:
    """One uvicorn (uvloop, httptools) in a thread on a pre-bound loopback socket, stopped on exit."""
    from service.api.app import create_app

    app = create_app(settings)
    sock = socket.socket()
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    sock.bind(("127.0.0.1", 0))
    port = sock.getsockname()[1]
    config = uvicorn.Config(
        app, loop="uvloop", http="httptools", lifespan="on", log_level=settings.log_level, access_log=settings.access_log, log_config=None
    )
    server = uvicorn.Server(config)
    thread = threading.Thread(target=server.run, kwargs={"sockets": [sock]}, daemon=True)
    thread.start()
    deadline = time.monotonic() + 20
    while not server.started:
        if not thread.is_alive() or time.monotonic() > deadline:
            raise RuntimeError("the test server did not start")
        time.sleep(0.01)
    try:
        yield RunningServer(f"http://127.0.0.1:{port}", settings, app)
    finally:
        server.should_exit = True
        thread.join(timeout=15)
        sock.close()


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


_session_ids = itertools.count()


@pytest.fixture(scope="session")
def sid():
    """A new session id on each call: tests that share a server never share a visit."""

    def new(tag: str = "s") -> str:
        return f"{tag}-{os.getpid()}-{next(_session_ids)}"

    return new


@pytest.fixture(scope="session")
def token() -> str:
    return TOKEN


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
