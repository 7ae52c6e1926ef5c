"""Child processes of a load test (the service it starts, Locust's master and workers)."""

from __future__ import annotations

import os
import signal
import subprocess
from pathlib import Path


def stop_group(p: subprocess.Popen, grace_s: float) -> None:
    """SIGTERM to the process group `p` leads (whatever it started too), SIGKILL if it lingers past `grace_s`."""
    try:
        os.killpg(p.pid, signal.SIGTERM)
        p.wait(timeout=grace_s)
    except ProcessLookupError:
        return
    except subprocess.TimeoutExpired:
        try:
            os.killpg(p.pid, signal.SIGKILL)
        except ProcessLookupError:
            return
        p.wait(timeout=5)


def log_tail(path: Path, lines: int) -> str:
    """The last `lines` lines of a child's log, for an error message."""
    try:
        return "\n".join(path.read_text(encoding="utf-8", errors="replace").splitlines()[-lines:])
    except OSError:
        return f"({path} unreadable)"
