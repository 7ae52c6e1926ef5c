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
from collections.abc import Callable
from typing import Any

from loadtest.budget import LOAD_FALLBACKS, Budget, budget_failures, generator_limited, generator_notes
from service.errors import LoadTestError
from bench.harness.service_process import LocalService, ServiceSpec
from loadtest.plan import LoadPlan
from loadtest.target import check_service_url
from loadtest.replay import visits_from_data
from loadtest.runner import default_load_workers, run_locust
from loadtest.preflight import BUSY_WARNING, check_answers, cpu_busy_share, warm_up
from loadtest.stats import StepStats, StepSummary, merge_steps, summarize

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
    warmup_s: float = 2.0  # seconds of uncounted clicks before the first step

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


def run_load_test(setup: LoadTestSetup, say: Callable[[str], None] | None = None) -> dict[str, Any]:
    """Run the load test and return its report (see loadtest/report.py for the fields). `say`
    receives progress lines as the run goes (each step's as it ends)."""
    say = say or (lambda line: None)
    notes: list[str] = []
    busy = cpu_busy_share()
    if busy is not None and busy > BUSY_WARNING:
        note = (
            f"other processes used {busy:.0%} of this machine's CPU just before the run: the service and the load "
            "generator had less, so the figures are lower than a quiet machine gives"
        )
        notes.append(note)
        say(f"warning: {note}")
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
            check_answers(url)
            if setup.warmup_s > 0:
                items = [item for v in range(min(visits.n_visits, 200)) for item in visits.clicks(v)]
                warmed = warm_up(url, items, setup.warmup_s, setup.count)
                say(f"warm-up: {warmed} clicks in {setup.warmup_s:g} s (not counted)")
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
            def on_step(k: int, stats: StepStats) -> None:
                window_end = stats.window_start + plan.step_duration_s
                row = _judged(summarize(k, stats, plan.step_rates[k], plan.step_duration_s, window_end), setup.budget, setup.users)
                say(step_line(row, plan.n_steps))

            run = run_locust(plan, work, on_step=on_step)

    steps = [summarize(k, s, plan.step_rates[k], plan.step_duration_s, run.run_end) for k, s in enumerate(run.steps)]
    overall = summarize(-1, merge_steps(run.steps), None, plan.total_duration_s, run.run_end)
    step_rows = [_judged(s, setup.budget, setup.users) for s in steps]
    for row in step_rows[run.steps_reported :]:  # the steps that ended with the run itself
        say(step_line(row, plan.n_steps))
    reasons = [f"step {row['index']}: {r}" for row in step_rows for r in row["failures"]]
    bottleneck = any(generator_limited(s) for s in steps)
    gen_notes = sorted({n for row in step_rows for n in row["notes"]}) + notes
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


def step_line(row: dict[str, Any], n_steps: int) -> str:
    """One step in one line, as printed when it ends and in the summary."""
    lat = row["latency_ms"]
    target = f"{row['target_rps']:,g}/s" if row["target_rps"] is not None else "think-time"
    fallbacks = sum((row.get("fallback_reason") or {}).get(reason, 0.0) for reason in LOAD_FALLBACKS)
    verdict = "meets the budget" if row["meets_budget"] else "over budget: " + "; ".join(row["failures"])
    return (
        f"step {row['index'] + 1}/{n_steps} ({target}): {row['rps']:,.1f} req/s, p50 {lat['p50']} ms, p99 {lat['p99']} ms, "
        f"errors {row['error_rate']:.2%}, load fallbacks {fallbacks:.2%}; {verdict}"
    )


def _judged(step: StepSummary, budget: Budget, users: int) -> dict[str, Any]:
    failures = budget_failures(step, budget)
    return {**step.to_json(), "meets_budget": not failures, "failures": failures, "notes": generator_notes(step, users)}

