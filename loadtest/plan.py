"""A load plan: everything the Locust processes need to know, written once by the CLI as JSON
and read by every Locust worker (the master forwards the plan's path to its workers).

A run is a sequence of steps of equal length. A step has a target request rate, or none: then
the visitors pace themselves by the log's think times (a closed loop: as fast as the service
answers when the think times are scaled to 0).
"""

from __future__ import annotations

import json
import math
from dataclasses import asdict, dataclass
from pathlib import Path

from service.errors import LoadTestError

REPLAY_MODES = ("loop", "once")


@dataclass(frozen=True)
class LoadPlan:
    url: str  # the service's base URL, e.g. http://127.0.0.1:8000
    users: int  # simulated visitors at once, over all load workers
    load_workers: int  # Locust worker processes
    step_rates: tuple[float | None, ...]  # target requests/s of each step over all workers; None: unpaced
    step_duration_s: float
    count: int  # items asked for per click
    budget_ms: int | None  # the time budget the service is told per click (the API takes whole ms); None: its default
    exclude_seen: bool
    think_scale: float  # 0: no waiting between clicks; 1: the log's own gaps
    max_think_s: float  # cap of one wait, so a visit idle for an hour in the log does not stall
    replay: str  # "loop": cycle through the visits; "once": every visit once, then stop
    visits_file: str
    out_dir: str  # where each worker writes worker-<index>.json
    run_id: str  # prefix of every session id of this run, so runs never share a session
    request_timeout_s: float

    def __post_init__(self) -> None:
        if self.users < 1:
            raise LoadTestError(f"users must be at least 1, got {self.users}")
        if self.load_workers < 1:
            raise LoadTestError(f"load workers must be at least 1, got {self.load_workers}")
        if not self.step_rates:
            raise LoadTestError("a load plan needs at least one step")
        if len({r is None for r in self.step_rates}) > 1:
            raise LoadTestError("either every step of a plan has a target rate or none has")
        for r in self.step_rates:
            if r is not None and not (r > 0 and math.isfinite(r)):
                raise LoadTestError(f"a step's target rate must be a positive number of requests/s, got {r}")
        if not (self.step_duration_s > 0 and math.isfinite(self.step_duration_s)):
            raise LoadTestError(f"step duration must be a positive number of seconds, got {self.step_duration_s}")
        if self.count < 1:
            raise LoadTestError(f"count must be at least 1, got {self.count}")
        if self.budget_ms is not None and not self.budget_ms > 0:
            raise LoadTestError(f"budget must be a positive number of milliseconds, got {self.budget_ms}")
        if not (self.think_scale >= 0 and math.isfinite(self.think_scale)):
            raise LoadTestError(f"think scale must be zero or positive, got {self.think_scale}")
        if not self.max_think_s >= 0:
            raise LoadTestError(f"max think time must be zero or positive, got {self.max_think_s}")
        if self.replay not in REPLAY_MODES:
            raise LoadTestError(f"replay {self.replay!r}: choose one of {', '.join(REPLAY_MODES)}")
        if not self.request_timeout_s > 0:
            raise LoadTestError(f"request timeout must be positive, got {self.request_timeout_s}")

    @property
    def n_steps(self) -> int:
        return len(self.step_rates)

    @property
    def total_duration_s(self) -> float:
        return self.n_steps * self.step_duration_s

    @property
    def paced(self) -> bool:
        return self.step_rates[0] is not None

    def step_at(self, elapsed_s: float) -> int:
        """Index of the step that `elapsed_s` seconds after the start falls in (n_steps when over)."""
        if elapsed_s < 0:
            return 0
        return min(int(elapsed_s // self.step_duration_s), self.n_steps)

    def write(self, path: Path) -> None:
        Path(path).write_text(json.dumps(asdict(self), indent=2), encoding="utf-8")

    @staticmethod
    def read(path: Path | str) -> "LoadPlan":
        try:
            d = json.loads(Path(path).read_text(encoding="utf-8"))
        except (OSError, json.JSONDecodeError) as exc:
            raise LoadTestError(f"{path}: unreadable load plan ({exc})") from exc
        d["step_rates"] = tuple(d["step_rates"])
        return LoadPlan(**d)
