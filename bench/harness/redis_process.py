"""A redis-server of our own on a loopback port, without persistence (never the machine's Redis on
6379): for the tests, the benchmarks and the load test. `kill` and `start` again at will."""

from __future__ import annotations

import shutil
import signal
import subprocess
from pathlib import Path

from bench.harness.ports import port_accepts, redis_answers
from bench.harness.processes import launch, stop_process, wait_ready
from service.errors import BenchError


class RedisProcess:
    """One redis-server on a fixed loopback port. With `tls`, the port is a TLS port and there is no
    plain one (`extra` then names the certificate files). `core` pins it with taskset."""

    def __init__(self, port: int, *extra: str, tls: bool = False, core: int | None = None, log_path: Path | None = None) -> None:
        self.port = port
        self.extra = extra
        self.tls = tls
        self.core = core
        self.log_path = log_path
        self.proc: subprocess.Popen | None = None
        binary = shutil.which("redis-server")
        if binary is None:
            raise BenchError("redis-server is not installed (`make redis-server` installs it from Debian's packages)")
        self.binary = binary

    @property
    def url(self) -> str:
        return f"redis://127.0.0.1:{self.port}/0"

    def start(self) -> RedisProcess:
        ports = ["--port", "0", "--tls-port", str(self.port)] if self.tls else ["--port", str(self.port)]
        self.proc = launch(
            [self.binary, *ports, "--bind", "127.0.0.1", "--save", "", "--appendonly", "no", *self.extra],
            log_path=self.log_path, core=self.core,
        )  # fmt: skip
        # A TLS-only port cannot answer a plain PING: an accepted connection is all we can check.
        ready = port_accepts if self.tls else redis_answers
        what = f"redis-server{' with TLS (is it built with TLS?)' if self.tls else ''} on port {self.port}"
        try:
            wait_ready(self.proc, lambda: ready(self.port), what, timeout_s=10, poll_s=0.02, log_path=self.log_path)
        except BenchError:
            self.kill()
            raise
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
            stop_process(self.proc, grace_s=5)
        self.proc = None
