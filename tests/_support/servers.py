"""The servers tests start, shared by every test folder: redis-server processes, the app on a real
uvicorn in a thread, and `cairn serve` (or any server command) as a subprocess.

Everything is real: redis-server without persistence on a free loopback port (never the system Redis
on 6379), uvicorn serving real HTTP on real sockets, subprocesses stopped at the end of the test.

Test modules and conftest files import this as `tests._support.servers`: pytest's importlib mode (pyproject
addopts) imports the tests/ folder as a namespace package named `tests`, and `python -m pytest` run
from the repository root (as `make test` does) also has it on sys.path.
"""

from __future__ import annotations

import contextlib
import itertools
import os
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path

import httpx
import pytest
import uvicorn

from bench.harness.ports import free_port  # noqa: F401 - tests take it from here with the servers
from bench.harness.processes import launch, stop_process, wait_ready
from bench.harness.redis_process import RedisProcess as _RedisProcess
from service.config import ENV_PREFIX, Settings
from service.errors import BenchError

TOKEN = "test-admin-token-0123456789"  # the admin token of the servers `shop_settings` describes
_ids = itertools.count()


def new_id(tag: str) -> str:
    """`{tag}{pid}-{n}`, new on each call: key prefixes and session ids that no two tests share."""
    return f"{tag}{os.getpid()}-{next(_ids)}"


def environment_without_cairn(**values: str) -> dict[str, str]:
    """This process's environment without its CAIRN_ variables, with `values` on top: for subprocesses."""
    env = {k: v for k, v in os.environ.items() if not k.startswith(ENV_PREFIX)}
    env.update(values)
    return env


# -- redis-server processes -------------------------------------------------------------------------


class RedisProcess(_RedisProcess):
    """The harness's redis-server; a start that fails fails the test that asked for it."""

    def start(self) -> RedisProcess:
        try:
            return super().start()  # type: ignore[return-value]
        except BenchError as exc:
            pytest.fail(str(exc))


# -- the app on uvicorn in a thread -----------------------------------------------------------------


@contextlib.contextmanager
def serve_app(app: object, log_level: str = "warning", access_log: bool = True, limit_concurrency: int | None = None) -> Iterator[str]:
    """`app` on one uvicorn (uvloop, httptools) in a thread on a pre-bound loopback socket; yields its
    base URL and stops the server on exit. `access_log` defaults to uvicorn's own default."""
    sock = socket.socket()
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    sock.bind(("127.0.0.1", 0))
    port = sock.getsockname()[1]
    # Shutdown waits for open connections at most 5 s, as `cairn serve` does.
    config = uvicorn.Config(
        app, loop="uvloop", http="httptools", lifespan="on", log_level=log_level, access_log=access_log, log_config=None,
        timeout_graceful_shutdown=5, limit_concurrency=limit_concurrency,
    )  # fmt: skip
    server = uvicorn.Server(config)
    thread = threading.Thread(target=server.run, kwargs={"sockets": [sock]}, daemon=True)
    thread.start()
    deadline = time.monotonic() + 20
    while not server.started:
        if not thread.is_alive() or time.monotonic() > deadline:
            raise RuntimeError("the test server did not start")
        time.sleep(0.01)
    try:
        yield f"http://127.0.0.1:{port}"
    finally:
        server.should_exit = True
        thread.join(timeout=10)
        if thread.is_alive():  # a connection that never closed: stop without waiting for it
            server.force_exit = True
            thread.join(timeout=5)
        sock.close()
        if thread.is_alive():
            # A uvicorn thread still running when the interpreter exits crashes it in native code
            # (a uvloop timer takes the GIL of a finalised interpreter): fail here, naming it.
            raise RuntimeError(f"the test server on port {port} did not stop ({len(server.server_state.connections)} connections open)")


@dataclass
class RunningServer:
    url: str
    settings: Settings
    app: object

    def client(self, **kwargs: object) -> httpx.Client:
        return httpx.Client(base_url=self.url, timeout=10, **kwargs)


def shop_settings(model_store: Path, store: str, *, tag: str, **overrides: object) -> Settings:
    """Settings for the shop/v1 artifact of `model_store`, with a key prefix no other server shares."""
    base: dict[str, object] = {
        "artifacts": model_store,
        "artifact_name": "shop",
        "artifact_version": "v1",
        "session_store": store,
        "redis_prefix": f"{new_id(tag)}:",
        "admin_token": TOKEN,
    }
    base.update(overrides)
    return Settings(**base)


@contextlib.contextmanager
def serve_in_thread(settings: Settings, **app_kwargs: object) -> Iterator[RunningServer]:
    """The cairn app for `settings` (uvicorn logging as the settings say), served by `serve_app`."""
    from service.api.app import create_app

    app = create_app(settings, **app_kwargs)
    with serve_app(app, log_level=settings.log_level, access_log=settings.access_log, limit_concurrency=settings.max_connections) as url:
        yield RunningServer(url, settings, app)


# -- server subprocesses ----------------------------------------------------------------------------


@contextlib.contextmanager
def running_process(
    command: list[str],
    *,
    log_path: Path,
    ready: Callable[[], bool],
    what: str,
    ignore: tuple[type[BaseException], ...] = (),
    timeout_s: float = 60,
    poll_s: float = 0.1,
    **popen: object,
) -> Iterator[subprocess.Popen]:
    """`command` as a subprocess, its output in `log_path`; yields once `ready()` is true (`ignore`:
    errors that mean "not yet"). The test fails with the log when the process exits first or
    `timeout_s` passes; the process is stopped (`stop_process`) on exit."""
    proc = launch(command, log_path=log_path, **popen)
    try:
        try:
            wait_ready(proc, ready, what, timeout_s=timeout_s, poll_s=poll_s, log_path=log_path, ignore=ignore)
        except BenchError as exc:
            pytest.fail(str(exc))
        yield proc
    finally:
        stop_process(proc)


def cairn_serve(args: list[str], cwd: Path, ready: Callable[[], bool], what: str, ignore: tuple[type[BaseException], ...] = (), **env: str):
    """`cairn serve *args` (this interpreter, `-m service.cli`) with the CAIRN_ variables `env` only,
    run in `cwd` with its log in cwd/serve.log: a `running_process`."""
    return running_process(
        [sys.executable, "-m", "service.cli", "serve", *args],
        log_path=cwd / "serve.log", ready=ready, what=what, ignore=ignore, env=environment_without_cairn(**env), cwd=cwd,
    )  # fmt: skip


def serve_shop(cwd: Path, model_store: Path, store_url: str, port: int, workers: int = 1, **env: str):
    """`cairn serve` on the test shop's shop/v1 artifact with `workers` workers sharing `store_url`,
    ready once every worker answers (each names itself in /metrics): a `running_process`."""
    import re

    url = f"http://127.0.0.1:{port}"

    def ready() -> bool:
        if workers == 1:
            return httpx.get(f"{url}/readyz", timeout=2).status_code == 200
        pids = set()
        with httpx.Client(base_url=url, timeout=2, limits=httpx.Limits(max_keepalive_connections=0)) as c:
            for _ in range(40):
                pids.update(re.findall(r'cairn_worker_info\{pid="(\d+)"\}', c.get("/metrics").text))
        return len(pids) >= workers

    settings = {"CAIRN_ARTIFACTS": str(model_store), "CAIRN_ARTIFACT_NAME": "shop", "CAIRN_ARTIFACT_VERSION": "v1",
                "CAIRN_SESSION_STORE": store_url, "CAIRN_LOG_LEVEL": "warning", **env}  # fmt: skip
    args = ["--port", str(port)] + (["--workers", str(workers)] if workers > 1 else [])
    return cairn_serve(args, cwd, ready, f"cairn serve --workers {workers}", ignore=(httpx.TransportError,), **settings)
