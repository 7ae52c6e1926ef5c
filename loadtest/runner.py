"""Run Locust headless for a load plan: one master and N worker processes on this machine.

Master and workers talk over loopback only (the master binds 127.0.0.1). The run is bounded:
the master has a run time of the plan's length plus a grace period, and this process kills
whatever is still running at a hard deadline. Every worker writes its own stats file
(loadtest/locustfile.py); they are merged here step by step.
"""

from __future__ import annotations

import csv
import json
import math
import subprocess
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from service.errors import LoadTestError
from loadtest.plan import LoadPlan
from bench.harness.ports import free_port
from bench.harness.processes import launch, log_tail, stop_process
from loadtest.stats import StepStats, merge_steps

LOCUSTFILE = Path(__file__).resolve().with_name("locustfile.py")
GRACE_S = 5.0  # master run time beyond the plan: workers normally end the run themselves before it
STARTUP_S = 60.0  # allowance for the processes to start and the workers to connect
POLL_S = 0.2


@dataclass
class LocustRun:
    steps: list[StepStats]  # merged over workers, one per step of the plan
    workers: list[dict]  # per worker: worker_index, pid, share, taken, ended_at
    run_end: float  # epoch s when the last worker's visitors stopped sending
    locust_requests: int | None  # Locust's own count of click requests, from its CSV stats
    locust_failures: int | None
    wall_s: float
    log_dir: Path
    steps_reported: int = 0  # steps `on_step` was called for while the run went on


def default_load_workers(users: int, cpus: int | None, local_service_workers: int) -> int:
    """One Locust worker per CPU core not used by a service running on this machine, at least one
    and at most one per simulated visitor (a worker without visitors would idle)."""
    free = (cpus or 1) - local_service_workers
    return max(1, min(users, free))


def run_locust(
    plan: LoadPlan, workdir: Path, python: str = sys.executable, on_step: Callable[[int, StepStats], None] | None = None
) -> LocustRun:
    """Run `plan`; `workdir` receives the plan, the Locust logs and CSV stats, the worker files.
    `on_step(k, merged stats)` is called as each step ends (from the workers' step files)."""
    if not LOCUSTFILE.is_file():
        raise LoadTestError(f"{LOCUSTFILE}: the locustfile is missing; reinstall cairn")
    workdir = Path(workdir)
    out_dir = Path(plan.out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    plan_path = workdir / "plan.json"
    plan.write(plan_path)
    port = free_port()
    run_time = math.ceil(plan.total_duration_s + GRACE_S)
    csv_prefix = workdir / "locust"
    master_cmd = [
        python, "-m", "locust", "-f", str(LOCUSTFILE), "--headless", "--master",
        "--master-bind-host", "127.0.0.1", "--master-bind-port", str(port),
        "--expect-workers", str(plan.load_workers), "--expect-workers-max-wait", str(int(STARTUP_S)),
        "-u", str(plan.users), "-r", str(max(plan.users * 20, 1)), "--run-time", f"{run_time}s",
        "--host", plan.url, "--stop-timeout", "0", "--csv", str(csv_prefix), "--only-summary",
        "--loglevel", "WARNING", "--exit-code-on-error", "0", "--cairn-plan", str(plan_path),
    ]  # fmt: skip
    worker_cmd = [
        python, "-m", "locust", "-f", str(LOCUSTFILE), "--worker",
        "--master-host", "127.0.0.1", "--master-port", str(port), "--loglevel", "WARNING",
    ]  # fmt: skip
    procs: list[tuple[str, subprocess.Popen]] = []
    start = time.monotonic()
    deadline = start + plan.total_duration_s + GRACE_S + STARTUP_S + 30.0
    try:
        procs.append(("master", _spawn(master_cmd, workdir / "locust-master.log", workdir)))
        for w in range(plan.load_workers):
            procs.append((f"worker {w}", _spawn(worker_cmd, workdir / f"locust-worker-{w}.log", workdir)))
        master = procs[0][1]
        reported = 0
        while master.poll() is None:
            if on_step is not None and reported < plan.n_steps:
                reported = _report_finished_steps(out_dir, plan, reported, on_step)
            if time.monotonic() > deadline:
                raise LoadTestError(f"Locust did not finish by its deadline; logs in {workdir}")
            for name, p in procs[1:]:
                rc = p.poll()
                if rc not in (None, 0):
                    raise LoadTestError(f"Locust {name} exited with code {rc}:\n{_tail(workdir, name)}")
            time.sleep(POLL_S)
        if master.returncode != 0:
            raise LoadTestError(f"Locust master exited with code {master.returncode}:\n{_tail(workdir, 'master')}")
        for name, p in procs[1:]:
            try:
                p.wait(timeout=15)
            except subprocess.TimeoutExpired:
                _stop(p)
    finally:
        for _, p in procs:
            if p.poll() is None:
                _stop(p)
    wall = time.monotonic() - start

    files = sorted(f for f in out_dir.glob("worker-*.json") if f.stem.removeprefix("worker-").isdigit())  # not the step files
    if len(files) != plan.load_workers:
        raise LoadTestError(
            f"{len(files)} of {plan.load_workers} Locust workers wrote their stats; logs in {workdir}:\n{_tail(workdir, 'master')}"
        )
    raw = [json.loads(f.read_text(encoding="utf-8")) for f in files]
    steps = [merge_steps([StepStats.from_json(r["steps"][k]) for r in raw]) for k in range(plan.n_steps)]
    workers = [{k: r[k] for k in ("worker_index", "pid", "share", "taken", "ended_at")} for r in raw]
    requests, failures = _locust_totals(Path(f"{csv_prefix}_stats.csv"))
    return LocustRun(
        steps=steps,
        workers=workers,
        run_end=max(float(w["ended_at"]) for w in workers),
        locust_requests=requests,
        locust_failures=failures,
        wall_s=wall,
        log_dir=workdir,
        steps_reported=reported,
    )


def _report_finished_steps(out_dir: Path, plan: LoadPlan, reported: int, on_step: Callable[[int, StepStats], None]) -> int:
    """Call `on_step` for each next step every worker has written; the count of steps reported."""
    while reported < plan.n_steps:
        files = sorted(out_dir.glob(f"worker-*.step-{reported}.json"))
        if len(files) < plan.load_workers:
            break
        try:
            parts = [StepStats.from_json(json.loads(f.read_text(encoding="utf-8"))) for f in files]
        except (OSError, ValueError):
            break  # a file being replaced: next poll
        on_step(reported, merge_steps(parts))
        reported += 1
    return reported


def _spawn(cmd: list[str], log: Path, cwd: Path) -> subprocess.Popen:
    # Own process group, so stopping one stops whatever it started; cwd is the run's own folder so
    # Locust finds no stray config file (it reads locust.conf and pyproject.toml from its cwd).
    return launch(cmd, log_path=log, cwd=cwd, group=True)


def _stop(p: subprocess.Popen) -> None:
    stop_process(p, grace_s=5)


def _tail(workdir: Path, name: str, lines: int = 15) -> str:
    return log_tail(workdir / ("locust-master.log" if name == "master" else f"locust-{name.replace(' ', '-')}.log"), lines)


def _locust_totals(path: Path) -> tuple[int | None, int | None]:
    """Request and failure counts of the `click` requests in Locust's own CSV stats."""
    try:
        with open(path, newline="", encoding="utf-8") as f:
            for row in csv.DictReader(f):
                if row.get("Name") == "click":
                    return int(row["Request Count"]), int(row["Failure Count"])
    except (OSError, KeyError, ValueError):
        return None, None
    return 0, 0
