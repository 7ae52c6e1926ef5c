"""The servers tests start, shared by every test folder: redis-server processes, the app on a real
uvicorn in a thread, and `cairn serve` (or any server command) as a subprocess.

Everything is real: redis-server without persistence on a free loopback port (never the system Redis
on 6379), uvicorn serving real HTTP on real sockets, subprocesses stopped at the end of the test.

Test modules and conftest files import this as `tests._servers`: pytest's importlib mode (pyproject
addopts) imports the tests/ folder as a namespace package named `tests`, and `python -m pytest` run
from the repository root (as `make test` does) also has it on sys.path.
"""

from __future__ import annotations

import contextlib
import itertools
import os
import random
import shutil
import signal
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

from service.config import ENV_PREFIX, Settings

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


def free_port(cluster_bus: bool = False) -> int:
    """A free loopback port (not 6379); with `cluster_bus`, port + 10000 is free too (Redis Cluster's bus)."""
    for _ in range(200):
        port = random.randint(20000, 55000) if cluster_bus else 0
        try:
            with socket.socket() as a:
                a.bind(("127.0.0.1", port))
                port = a.getsockname()[1]
                if cluster_bus:
                    with socket.socket() as b:
                        b.bind(("127.0.0.1", port + 10000))
        except OSError:
            continue
        if port != 6379:
            return port
    raise RuntimeError("no free loopback port")


def redis_answers(port: int, timeout: float = 0.2) -> bool:
    """True once a plain-text PING on the port gets +PONG (the RESP protocol's simple-string reply)."""
    with contextlib.suppress(OSError), socket.create_connection(("127.0.0.1", port), timeout=timeout) as s:
        s.sendall(b"PING\r\n")
        return s.recv(64).startswith(b"+PONG")
    return False


def port_accepts(port: int, timeout: float = 0.2) -> bool:
    """True once a TCP connection to the port is accepted (a TLS-only port cannot answer a plain PING)."""
    with contextlib.suppress(OSError), socket.create_connection(("127.0.0.1", port), timeout=timeout):
        return True
    return False


class RedisProcess:
    """One redis-server on a fixed loopback port, without persistence; `kill` and `start` again at will.

    With `tls`, the port is a TLS port and there is no plain one (`extra` then names the certificate files).
    """

    def __init__(self, port: int, *extra: str, tls: bool = False) -> None:
        self.port = port
        self.extra = extra
        self.tls = tls
        self.proc: subprocess.Popen | None = None
        self.binary = shutil.which("redis-server")
        if self.binary is None:
            pytest.fail("redis-server is not installed: the tests need it (`make redis-server` installs it)")

    @property
    def url(self) -> str:
        return f"redis://127.0.0.1:{self.port}/0"

    def start(self) -> RedisProcess:
        ports = ["--port", "0", "--tls-port", str(self.port)] if self.tls else ["--port", str(self.port)]
        self.proc = subprocess.Popen(
            [self.binary, *ports, "--bind", "127.0.0.1", "--save", "", "--appendonly", "no", *self.extra],
            stdout=subprocess.DEVNULL, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
        )  # fmt: skip
        ready = port_accepts if self.tls else redis_answers
        deadline = time.monotonic() + 10
        while not ready(self.port):
            if self.proc.poll() is not None or time.monotonic() > deadline:
                self.kill()
                what = " with TLS (is it built with TLS?)" if self.tls else ""
                pytest.fail(f"redis-server{what} did not start on port {self.port}")
            time.sleep(0.02)
        return self

    def kill(self) -> None:
        """SIGKILL: the process dies at once, as in a crash; its sockets are closed by the kernel."""
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGKILL)
            self.proc.wait(timeout=5)
        self.proc = None

    def stop(self) -> None:
        """SIGTERM, as at a normal shutdown; SIGKILL if it has not exited within 5 s."""
        if self.proc is not None:
            stop_process(self.proc, wait_s=5)
        self.proc = None


# -- the app on uvicorn in a thread -----------------------------------------------------------------


@contextlib.contextmanager
def serve_app(app: object, log_level: str = "warning", access_log: bool = True) -> Iterator[str]:
    """`app` on one uvicorn (uvloop, httptools) in a thread on a pre-bound loopback socket; yields its
    base URL and stops the server on exit. `access_log` defaults to uvicorn's own default."""
    sock = socket.socket()
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    sock.bind(("127.0.0.1", 0))
    port = sock.getsockname()[1]
    # Shutdown waits for open connections at most 5 s, as `cairn serve` does.
    config = uvicorn.Config(
        app, loop="uvloop", http="httptools", lifespan="on", log_level=log_level, access_log=access_log, log_config=None,
        timeout_graceful_shutdown=5,
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
        "model_store": model_store,
        "model_name": "shop",
        "model_version": "v1",
        "store": store,
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
    with serve_app(app, log_level=settings.log_level, access_log=settings.access_log) as url:
        yield RunningServer(url, settings, app)


# -- server subprocesses ----------------------------------------------------------------------------


def stop_process(proc: subprocess.Popen, wait_s: float = 15) -> None:
    """SIGTERM and wait up to `wait_s`; SIGKILL if it is still running."""
    proc.terminate()
    try:
        proc.wait(timeout=wait_s)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait(timeout=5)


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
    with open(log_path, "w+") as log:
        proc = subprocess.Popen(command, stdout=log, stderr=subprocess.STDOUT, **popen)
        try:
            deadline = time.monotonic() + timeout_s
            while True:
                try:
                    if ready():
                        break
                except ignore:
                    pass
                if proc.poll() is not None or time.monotonic() > deadline:
                    log.seek(0)
                    pytest.fail(f"{what} did not come up:\n{log.read()}")
                time.sleep(poll_s)
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
