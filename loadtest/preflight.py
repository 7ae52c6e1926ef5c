"""Before minutes of load: is the service there, is it warm, and is this machine free to measure?

- `check_answers`: GET /readyz must answer (any status) within a few seconds; a closed port or a
  wrong host fails at once with one line, instead of a run that reports 100% errors.
- `warm_up`: a few seconds of real clicks (sessions of their own, not counted), so the first step
  does not measure a cold service (first model calls, connection pools, the CPU's frequency).
- `cpu_busy_share`: the share of this machine's CPU time others used over a short sample; when it
  is high the load test warns, since a busy machine caps what both the service and the load
  generator can do (a capacity run then says no step met the budget where a quiet one did).
"""

from __future__ import annotations

import json
import time
import urllib.error
import urllib.request
from pathlib import Path

from service.errors import LoadTestError

BUSY_WARNING = 0.25  # share of all cores already busy before the run that earns a warning (common practice)


def check_answers(url: str, timeout_s: float = 5.0) -> None:
    try:
        with urllib.request.urlopen(f"{url}/readyz", timeout=timeout_s):
            return
    except urllib.error.HTTPError:
        return  # it answers (503 while degraded is still an answer; the run will show it)
    except (urllib.error.URLError, OSError) as exc:
        reason = getattr(exc, "reason", exc)
        raise LoadTestError(f"--url {url}: no service answers there ({reason}); start it first or use --serve") from None


def warm_up(url: str, items: list[str], seconds: float, count: int) -> int:
    """Clicks, one after another, for up to `seconds`; returns how many were answered."""
    deadline = time.monotonic() + seconds
    answered = 0
    for n, item in enumerate(items):
        if time.monotonic() >= deadline:
            break
        body = json.dumps({"item_id": item, "count": count}).encode()
        request = urllib.request.Request(
            f"{url}/v1/sessions/warmup-{n // 10}/clicks", data=body, method="POST", headers={"Content-Type": "application/json"}
        )
        try:
            with urllib.request.urlopen(request, timeout=5.0) as resp:
                resp.read()
                answered += 1
        except (urllib.error.URLError, OSError):
            pass
    return answered


def cpu_busy_share(sample_s: float = 0.5) -> float | None:
    """Share of all CPU time spent busy over `sample_s` (Linux /proc/stat); None where unreadable."""

    def read() -> tuple[int, int] | None:
        try:
            fields = Path("/proc/stat").read_text().splitlines()[0].split()[1:]
        except (OSError, IndexError):
            return None
        values = [int(v) for v in fields]
        idle = values[3] + (values[4] if len(values) > 4 else 0)  # idle + iowait
        return sum(values), idle

    first = read()
    time.sleep(sample_s)
    second = read()
    if first is None or second is None or second[0] <= first[0]:
        return None
    total, idle = second[0] - first[0], second[1] - first[1]
    return max(0.0, 1.0 - idle / total)
