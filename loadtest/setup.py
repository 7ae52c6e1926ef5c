"""One load test, end to end: visits from the data set, the service (given or started here),
Locust for the plan, and the judged steps as a report dictionary (service/load/report.py
writes it out)."""

from __future__ import annotations

import contextlib
import math
import os
import secrets
import tempfile
import time
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from loadtest.budget import Budget, budget_failures, generator_limited, generator_notes
from service.errors import LoadTestError
from bench.harness.service_process import LocalService, ServiceSpec
from loadtest.plan import LoadPlan
from loadtest.target import check_service_url
from loadtest.replay import visits_from_data
from loadtest.runner import default_load_workers, run_locust
from loadtest.stats import StepSummary, merge_steps, summarize

REPORT_KIND = "cairn-loadtest/1"
MAX_STEPS = 100
REQUEST_TIMEOUT_S = 10.0  # one click; far beyond any page budget, so only a stuck service hits it


@dataclass(frozen=True)
class LoadTestSetup:
    url: str | None  # the service to load, or None to start one here from `service`
    service: ServiceSpec | None
    data: Path
    max_visits: int | None
    users: int
    load_workers: int | None  # None: chosen from the CPU count
    step_rates: tuple[float | None, ...]
    step_duration_s: float
    count: int
    budget_ms: int | None
    exclude_seen: bool
    think_scale: float
    max_think_s: float
    replay: str
    budget: Budget

    def __post_init__(self) -> None:
        if (self.url is None) == (self.service is None):
            raise LoadTestError("give either --url (a running service) or --serve (start one here)")
        if self.url is not None:
            object.__setattr__(self, "url", check_service_url(self.url))
        if self.users < 1:
            raise LoadTestError(f"--users must be at least 1, got {self.users}")
        if self.load_workers is not None:
            if self.load_workers < 1:
                raise LoadTestError(f"--load-workers must be at least 1, got {self.load_workers}")
            if self.load_workers > self.users:
                raise LoadTestError(
                    f"--load-workers {self.load_workers} > --users {self.users}: every worker needs at least one visitor"
                )


def parse_ramp(spec: str) -> tuple[float, ...]:
    """'START:STOP:STEP' (requests/s) -> START, START+STEP, ... up to and including STOP."""
    parts = spec.split(":")
    try:
        if len(parts) != 3:
            raise ValueError
        start, stop, step = (float(p) for p in parts)
    except ValueError:
        raise LoadTestError(f"--ramp {spec!r}: write START:STOP:STEP in requests/s, e.g. 50:400:50") from None
    if not (start > 0 and step > 0 and stop >= start and all(map(math.isfinite, (start, stop, step)))):
        raise LoadTestError(f"--ramp {spec!r}: needs START > 0, STEP > 0 and STOP >= START")
    n = int(math.floor((stop - start) / step + 1e-9)) + 1
    if n > MAX_STEPS:
        raise LoadTestError(f"--ramp {spec!r}: {n} steps; at most {MAX_STEPS}, use a larger STEP")
    return tuple(round(start + k * step, 9) for k in range(n))


def run_load_test(setup: LoadTestSetup) -> dict[str, Any]:
    """Run the load test and return its report (see service/load/report.py for the fields)."""
    # The cores this process may run on (a container's or taskset's limit), not the machine's.
    cpus = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    local_workers = setup.service.workers if setup.service is not None else 0
    load_workers = setup.load_workers or default_load_workers(setup.users, cpus, local_workers)
    started_at = datetime.now(timezone.utc).isoformat(timespec="seconds")
    t0 = time.monotonic()
    with tempfile.TemporaryDirectory(prefix="cairn-loadtest-") as tmp:
        work = Path(tmp)
        visits = visits_from_data(setup.data, max_visits=setup.max_visits)
        visits.save(work / "visits.npz")
        service_ctx = (
            LocalService(setup.service, work / "service.log") if setup.service is not None else contextlib.nullcontext()
        )
        with service_ctx as svc:
            url = svc.url if svc is not None else setup.url
            plan = LoadPlan(
                url=url,
                users=setup.users,
                load_workers=load_workers,
                step_rates=setup.step_rates,
                step_duration_s=setup.step_duration_s,
                count=setup.count,
                budget_ms=setup.budget_ms,
                exclude_seen=setup.exclude_seen,
                think_scale=setup.think_scale,
                max_think_s=setup.max_think_s,
                replay=setup.replay,
                visits_file=str(work / "visits.npz"),
                out_dir=str(work / "out"),
                run_id=f"lt{secrets.token_hex(4)}",
                request_timeout_s=REQUEST_TIMEOUT_S,
            )
            run = run_locust(plan, work)

    steps = [summarize(k, s, plan.step_rates[k], plan.step_duration_s, run.run_end) for k, s in enumerate(run.steps)]
    overall = summarize(-1, merge_steps(run.steps), None, plan.total_duration_s, run.run_end)
    step_rows = [_judged(s, setup.budget, setup.users) for s in steps]
    reasons = [f"step {row['index']}: {r}" for row in step_rows for r in row["failures"]]
    bottleneck = any(generator_limited(s) for s in steps)
    gen_notes = sorted({n for row in step_rows for n in row["notes"]})
    if plan.paced:
        gen_notes.append("think times were not used: with a target rate the pacing sets when clicks are sent")
    return {
        "kind": REPORT_KIND,
        "started_at": started_at,
        "wall_s": round(time.monotonic() - t0, 3),
        "target": {
            "url": plan.url,
            "served_here": setup.service is not None,
            "service": setup.service.describe() if setup.service is not None else None,
        },
        "settings": {
            "users": setup.users,
            "load_workers": load_workers,
            "mode": "ramp" if plan.n_steps > 1 else ("rate" if plan.paced else "think-time"),
            "step_rates": list(plan.step_rates),
            "step_duration_s": plan.step_duration_s,
            "duration_s": plan.total_duration_s,
            "count": setup.count,
            "budget_ms": setup.budget_ms,
            "exclude_seen": setup.exclude_seen,
            "think_scale": setup.think_scale,
            "max_think_s": setup.max_think_s,
            "replay": setup.replay,
        },
        "visits": {
            "data": str(setup.data),
            "split": "test",
            "available": visits.n_visits,
            "clicks": visits.n_clicks,
            "taken": sum(w["taken"] for w in run.workers),
        },
        "budget": {
            "p99_ms": setup.budget.p99_ms,
            "max_error_rate": setup.budget.max_error_rate,
            "max_fallback_rate": setup.budget.max_fallback_rate,
        },
        "verdict": {"met": not reasons, "reasons": reasons},
        "overall": {**overall.to_json(), "index": None, "failures": budget_failures(overall, setup.budget)},
        "steps": step_rows,
        "load_generator": {
            "workers": load_workers,
            "cpu_count": cpus,
            "max_cpu_percent": round(max((s.generator_cpu_percent for s in steps), default=0.0), 2),
            "bottleneck": bottleneck,
            "notes": gen_notes,
        },
        "locust": {"requests": run.locust_requests, "failures": run.locust_failures},
    }


def _judged(step: StepSummary, budget: Budget, users: int) -> dict[str, Any]:
    failures = budget_failures(step, budget)
    return {**step.to_json(), "meets_budget": not failures, "failures": failures, "notes": generator_notes(step, users)}

