"""Start a child process (optionally pinned to one core), wait until it is ready, stop it, read its
log's tail: the one way the benchmarks, the load test and the tests handle the processes they start."""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import time
from collections.abc import Callable, Sequence
from pathlib import Path

from service.errors import BenchError


def launch(
    command: Sequence[str],
    *,
    log_path: Path | None = None,
    core: int | None = None,
    env: dict[str, str] | None = None,
    cwd: Path | None = None,
    group: bool = False,
) -> subprocess.Popen:
    """`command` as a child process; output to `log_path` (or discarded); pinned to `core` with
    taskset when given; in a process group of its own with `group` (so `stop_process` reaches
    whatever it starts too, such as uvicorn's workers)."""
    pin = ["taskset", "-c", str(core)] if core is not None else []
    if pin and shutil.which("taskset") is None:
        raise BenchError("taskset is not installed: it pins benchmark processes to a core (util-linux)")
    if log_path is None:
        return subprocess.Popen(
            [*pin, *command], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, stdin=subprocess.DEVNULL,
            env=env, cwd=cwd, start_new_session=group,
        )  # fmt: skip
    with open(log_path, "wb") as log:  # the child keeps its own copy of the descriptor
        return subprocess.Popen(
            [*pin, *command], stdout=log, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
            env=env, cwd=cwd, start_new_session=group,
        )  # fmt: skip


def wait_ready(
    proc: subprocess.Popen,
    ready: Callable[[], bool],
    what: str,
    *,
    timeout_s: float = 60.0,
    poll_s: float = 0.05,
    log_path: Path | None = None,
    ignore: tuple[type[BaseException], ...] = (),
) -> None:
    """Return once `ready()` is true (`ignore`: exceptions that mean "not yet"); BenchError naming
    `what` and the log's last lines if the process exits first or `timeout_s` passes."""
    deadline = time.monotonic() + timeout_s
    while True:
        try:
            if ready():
                return
        except ignore:
            pass
        rc = proc.poll()
        if rc is not None or time.monotonic() > deadline:
            why = f"exited with code {rc}" if rc is not None else f"was not ready within {timeout_s:.0f} s"
            tail = f":\n{log_tail(log_path, 30)}" if log_path is not None else ""
            raise BenchError(f"{what} {why}{tail}")
        time.sleep(poll_s)


def stop_process(proc: subprocess.Popen, grace_s: float = 15.0) -> None:
    """SIGTERM (to the whole process group when the child leads one), then SIGKILL if it is still
    running after `grace_s`. A process that already ended is left alone."""
    if proc.poll() is not None:
        return
    leads_group = _leads_group(proc)
    try:
        if leads_group:
            os.killpg(proc.pid, signal.SIGTERM)
        else:
            proc.terminate()
        proc.wait(timeout=grace_s)
    except ProcessLookupError:
        return
    except subprocess.TimeoutExpired:
        try:
            if leads_group:
                os.killpg(proc.pid, signal.SIGKILL)
            else:
                proc.kill()
        except ProcessLookupError:
            return
        proc.wait(timeout=5)


def stop_all(procs: Sequence[subprocess.Popen], grace_s: float = 15.0) -> None:
    """`stop_process` for each, last started first."""
    for proc in reversed(list(procs)):
        stop_process(proc, grace_s)


def log_tail(path: Path, lines: int = 20) -> str:
    """The last `lines` lines of a child's log, for an error message."""
    try:
        return "\n".join(Path(path).read_text(encoding="utf-8", errors="replace").splitlines()[-lines:])
    except OSError:
        return f"({path} unreadable)"


def _leads_group(proc: subprocess.Popen) -> bool:
    try:
        return os.getpgid(proc.pid) == proc.pid
    except ProcessLookupError:
        return False


def wait_http(proc: subprocess.Popen, port: int, path: str, *, timeout_s: float = 60.0, log_path: Path | None = None) -> None:
    """`wait_ready` for an HTTP server on 127.0.0.1:port: ready once GET `path` answers."""
    from bench.harness.ports import http_answers

    wait_ready(proc, lambda: http_answers(port, path), f"the server on port {port}", timeout_s=timeout_s, poll_s=0.1, log_path=log_path)
