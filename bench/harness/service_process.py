"""Start the service on a free loopback port for a load test, and stop it afterwards.

The service runs as its own process (`python -m service.cli serve`), configured the way an
operator would: flags for the address and workers, CAIRN_* variables for the rest, so the load
test measures the same start-up path as production. It is ready when GET /readyz answers 200.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time
import urllib.error
import urllib.request
from dataclasses import dataclass
from pathlib import Path

from service.errors import LoadTestError
from bench.harness.ports import free_port
from bench.harness.processes import launch, log_tail, stop_process

MODELS = ("gru", "neighbours", "popularity")
READY_POLL_S = 0.2


@dataclass(frozen=True)
class ServiceSpec:
    recommender: str | None = None  # None: the service's default
    session_store: str | None = None  # "memory" or a redis:// URL; None: the service's default
    artifacts: Path | None = None
    artifact_name: str | None = None
    artifact_version: str | None = None
    workers: int = 1
    port: int | None = None  # None: a free loopback port

    def __post_init__(self) -> None:
        if self.recommender is not None and self.recommender not in MODELS:
            raise LoadTestError(f"--recommender {self.recommender!r}: choose one of {', '.join(MODELS)}")
        if self.workers < 1:
            raise LoadTestError(f"--workers must be at least 1, got {self.workers}")
        if self.artifacts is not None and not Path(self.artifacts).is_dir():
            raise LoadTestError(f"--artifacts {self.artifacts}: no such folder")

    def environment(self) -> dict[str, str]:
        """The CAIRN_* variables that select this service's recommender, artifact and session store."""
        pairs = {
            "CAIRN_RECOMMENDER": self.recommender,
            "CAIRN_SESSION_STORE": self.session_store,
            "CAIRN_ARTIFACTS": None if self.artifacts is None else str(Path(self.artifacts).resolve()),
            "CAIRN_ARTIFACT_NAME": self.artifact_name,
            "CAIRN_ARTIFACT_VERSION": self.artifact_version,
        }
        return {k: v for k, v in pairs.items() if v is not None}

    def describe(self) -> dict[str, object]:
        return {
            "recommender": self.recommender,
            "session_store": self.session_store,
            "artifacts": None if self.artifacts is None else str(self.artifacts),
            "artifact_name": self.artifact_name,
            "artifact_version": self.artifact_version,
            "workers": self.workers,
            "port": self.port,
        }


class LocalService:
    """Context manager: the service running on 127.0.0.1:<free port> until the block ends."""

    def __init__(self, spec: ServiceSpec, log_path: Path, startup_timeout_s: float = 60.0, python: str = sys.executable):
        self.spec = spec
        self.log_path = Path(log_path)
        self.startup_timeout_s = startup_timeout_s
        self.python = python
        self.port = 0
        self._proc: subprocess.Popen | None = None

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    def __enter__(self) -> "LocalService":
        self.port = self.spec.port if self.spec.port is not None else free_port()
        cmd = [
            self.python, "-m", "service.cli", "serve",
            "--host", "127.0.0.1", "--port", str(self.port), "--workers", str(self.spec.workers),
        ]  # fmt: skip
        # The child inherits this environment with the spec's CAIRN_* variables on top.
        env = {**os.environ, **self.spec.environment()}
        self._proc = launch(cmd, log_path=self.log_path, env=env, group=True)
        try:
            self._wait_ready()
        except BaseException:
            self.stop()
            raise
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()

    def _wait_ready(self) -> None:
        deadline = time.monotonic() + self.startup_timeout_s
        last = "no answer yet"
        while time.monotonic() < deadline:
            rc = self._proc.poll()
            if rc is not None:
                raise LoadTestError(f"the service exited with code {rc} while starting:\n{self.log_tail()}")
            try:
                with urllib.request.urlopen(f"{self.url}/readyz", timeout=2.0) as resp:
                    if resp.status == 200:
                        return
                    last = f"/readyz answered {resp.status}"
            except urllib.error.HTTPError as exc:
                last = f"/readyz answered {exc.code}"
            except (urllib.error.URLError, OSError) as exc:
                last = f"/readyz: {exc}"
            time.sleep(READY_POLL_S)
        raise LoadTestError(f"the service was not ready within {self.startup_timeout_s:.0f} s ({last}):\n{self.log_tail()}")

    def stop(self) -> None:
        """SIGTERM to the service's process group (its workers too), SIGKILL if it lingers."""
        p, self._proc = self._proc, None
        if p is None or p.poll() is not None:
            return
        stop_process(p, grace_s=15)

    def log_tail(self, lines: int = 20) -> str:
        return log_tail(self.log_path, lines)
