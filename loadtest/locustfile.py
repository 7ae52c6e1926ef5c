"""cairn load test: simulated visitors replay held-out visits against the service, click by click.

Started by `cairn loadtest` and `cairn capacity` (service/load/runner.py) as one Locust master and
N worker processes. The CLI writes a load plan (service/load/plan.py) and passes its path as
`--cairn-plan`; the master forwards it to its workers. Each worker replays its own share of the
visits (service/load/replay.py), every replay under a new session id (run id + worker + counter),
so repeated replays never meet an old session.

A click is one POST /v1/sessions/{id}/clicks with `count`, `budget_ms` and `exclude_seen` as a
storefront would send them. Between clicks a visitor waits the log's own gap times the think
scale (capped), or, when the step has a target rate, takes the next slot of the worker's pacing
schedule instead (service/load/pacing.py). After each answer the visitor notes whether its next
click (known from the log) is among the items it was just shown: a hit. A failed answer shows
nothing, so it counts as a miss.

Each worker keeps its own per-step stats (service/load/stats.py) and writes them to
`<out_dir>/worker-<index>.json` when it stops. A worker stops its visitors when the plan is over
(its last step has ended, or, with replay "once", its share is done) and then quits, which ends
the run as soon as every worker is done.
"""

from __future__ import annotations

import json
import os
import time
from pathlib import Path

import gevent
from locust import FastHttpUser, constant, events, task
from locust.exception import StopUser
from locust.runners import MasterRunner

from loadtest.pacing import Pacer
from loadtest.plan import LoadPlan
from loadtest.replay import VisitSet
from loadtest.stats import NO_FALLBACK, StepStats

CPU_SAMPLE_S = 0.25  # how often a worker samples its own CPU time
STEP_SETTLE_S = 1.0  # a step's file is written this long after its window, once its last answers came in
DONE_MESSAGE = "cairn-worker-done"  # worker -> master: all my visitors have left


@events.init_command_line_parser.add_listener
def _add_arguments(parser) -> None:
    parser.add_argument("--cairn-plan", type=str, default="", help="load plan written by `cairn loadtest` (JSON)")


class _WorkerRun:
    """What the visitors of one worker process share; made at test start, written at stop."""

    def __init__(self, plan: LoadPlan, worker_index: int, environment) -> None:
        self.plan = plan
        self.environment = environment
        self.worker_index = worker_index
        self.visits = VisitSet.load(Path(plan.visits_file))
        self.share = self.visits.share(worker_index, plan.load_workers)
        self.start = time.time()
        self.end = self.start + plan.total_duration_s
        self.steps = [StepStats(window_start=self.start + k * plan.step_duration_s) for k in range(plan.n_steps)]
        # A paced plan splits its rate evenly over the workers: each paces its own share.
        self.pacer = (
            Pacer(tuple(float(r) / plan.load_workers for r in plan.step_rates), plan.step_duration_s, self.start, time.time)
            if plan.paced
            else None
        )
        self.taken = 0  # visits taken so far by this worker's visitors (also numbers the sessions)
        self.active = 0  # visitors that have not left yet
        self.over = False
        self.ended_at: float | None = None  # when this worker's visitors stopped sending
        self.written = False
        self.body_base = {"count": plan.count, "exclude_seen": plan.exclude_seen}
        if plan.budget_ms is not None:
            self.body_base["budget_ms"] = plan.budget_ms
        self._last_sample = (time.time(), time.process_time())
        self._steps_written = 0  # steps whose own file is out (the runner prints each as it ends)
        self.sampler = gevent.spawn(self._sample_cpu)

    def take_visit(self) -> tuple[int, str] | None:
        """(visit index, session id) of the next visit to replay, or None when there is none."""
        if self.over or not self.share:
            return None
        if self.plan.replay == "once" and self.taken >= len(self.share):
            return None
        v = self.share[self.taken % len(self.share)]
        self.taken += 1
        return v, f"{self.plan.run_id}-w{self.worker_index}-{self.taken}"

    def leave(self) -> None:
        """A visitor leaves for good; when the last one has left, this worker tells the master,
        which ends the run once every worker is done (the workers then send Locust their final
        stats and stop)."""
        self.active -= 1
        if self.active <= 0 and not self.over:
            self.over = True
            self.ended_at = time.time()
            self._sample_cpu_once()
            self.environment.runner.send_message(DONE_MESSAGE, {"worker_index": self.worker_index})

    def _sample_cpu(self) -> None:
        # Bounded: the plan's length plus a minute of slack, at one sample per CPU_SAMPLE_S.
        max_samples = int((self.plan.total_duration_s + 60.0) / CPU_SAMPLE_S) + 1
        for _ in range(max_samples):
            gevent.sleep(CPU_SAMPLE_S)
            if self.over:
                return
            self._sample_cpu_once()
            self._write_finished_steps()
            if time.time() >= self.end:
                return

    def _write_finished_steps(self) -> None:
        """worker-<i>.step-<k>.json for each step that has ended, so the runner can print it as it ends;
        the run's final file stays the authority (a few late answers may land after this)."""
        now = time.time()
        while self._steps_written < self.plan.n_steps:
            k = self._steps_written
            if now < self.start + (k + 1) * self.plan.step_duration_s + STEP_SETTLE_S:
                return
            out = Path(self.plan.out_dir) / f"worker-{self.worker_index}.step-{k}.json"
            tmp = out.with_suffix(".tmp")
            tmp.write_text(json.dumps(self.steps[k].to_json()), encoding="utf-8")
            os.replace(tmp, out)
            self._steps_written += 1

    def _sample_cpu_once(self) -> None:
        """Add the CPU time used since the last sample to the step of that interval's midpoint."""
        wall, cpu = time.time(), time.process_time()
        last_wall, last_cpu = self._last_sample
        k = self.plan.step_at((last_wall + wall) / 2.0 - self.start)
        if k < self.plan.n_steps:
            self.steps[k].cpu_s += cpu - last_cpu
            self.steps[k].wall_s += wall - last_wall
        self._last_sample = (wall, cpu)

    def write(self) -> None:
        out = Path(self.plan.out_dir) / f"worker-{self.worker_index}.json"
        tmp = out.with_suffix(".json.tmp")
        payload = {
            "worker_index": self.worker_index,
            "pid": os.getpid(),
            "share": len(self.share),
            "taken": self.taken,
            "ended_at": self.ended_at if self.ended_at is not None else time.time(),
            "steps": [s.to_json() for s in self.steps],
        }
        tmp.write_text(json.dumps(payload), encoding="utf-8")
        os.replace(tmp, out)
        self.written = True


_run: _WorkerRun | None = None


@events.init.add_listener
def _on_init(environment, **_kw) -> None:
    runner = environment.runner
    if not isinstance(runner, MasterRunner):
        return
    done: set[int] = set()

    def on_done(environment, msg, **_kw) -> None:
        done.add(int(msg.data["worker_index"]))
        expected = LoadPlan.read(environment.parsed_options.cairn_plan).load_workers
        if len(done) >= expected:
            # From a fresh greenlet: quitting waits on the greenlet that delivers this message.
            gevent.spawn(environment.runner.quit)

    runner.register_message(DONE_MESSAGE, on_done)


@events.test_start.add_listener
def _on_test_start(environment, **_kw) -> None:
    global _run
    if isinstance(environment.runner, MasterRunner):
        return
    plan_path = environment.parsed_options.cairn_plan if environment.parsed_options else ""
    if not plan_path:
        raise RuntimeError("cairn locustfile: no --cairn-plan given; run it through `cairn loadtest`")
    plan = LoadPlan.read(plan_path)
    Visitor.network_timeout = plan.request_timeout_s
    Visitor.connection_timeout = plan.request_timeout_s
    _run = _WorkerRun(plan, max(0, int(getattr(environment.runner, "worker_index", 0))), environment)


@events.test_stop.add_listener
def _on_test_stop(environment, **_kw) -> None:
    if _run is not None:
        _run.over = True
        _run.write()


@events.quitting.add_listener
def _on_quitting(environment, **_kw) -> None:
    if _run is not None and not _run.written:
        _run.write()


class Visitor(FastHttpUser):
    """One simulated visitor: replays whole visits, one after another, until the plan is over."""

    wait_time = constant(0)  # the waits happen between the clicks of a visit, inside the task
    network_timeout = 10.0
    connection_timeout = 10.0

    def on_start(self) -> None:
        if _run is None:
            raise StopUser()
        _run.active += 1

    @task
    def replay_visit(self) -> None:
        run = _run
        taken = run.take_visit()
        if taken is None:
            self._leave()
        v, session_id = taken
        clicks = run.visits.clicks(v)
        gaps = run.visits.visit_gaps(v)
        path = f"/v1/sessions/{session_id}/clicks"
        step_stats = None
        for i, item in enumerate(clicks):
            step = self._wait_turn(gaps[i] if i else 0.0)
            if step is None:
                self._leave()
            step_stats = run.steps[step]
            if i == 0:
                step_stats.visits_started += 1
            body = {"item_id": item, "event_id": f"{session_id}-{i}", **run.body_base}
            shown = self._click(path, body, step_stats)
            if i + 1 < len(clicks):
                step_stats.hit_events += 1
                if clicks[i + 1] in shown:
                    step_stats.hits += 1
        if step_stats is not None:
            step_stats.visits_completed += 1

    def _leave(self) -> None:
        _run.leave()
        raise StopUser()

    def _wait_turn(self, gap_s: float) -> int | None:
        """Wait until this click is due; its step index, or None when the plan is over."""
        run = _run
        if run.over:
            return None
        if run.pacer is not None:
            slot = run.pacer.take_slot()
            if slot is None:
                return None
            step, wait_s = slot
            if wait_s > 0:
                gevent.sleep(wait_s)
            return step
        plan = run.plan
        if plan.think_scale > 0 and gap_s > 0:
            # Never past the plan's end: a visitor asleep then would hold the run open.
            gevent.sleep(max(0.0, min(gap_s * plan.think_scale, plan.max_think_s, run.end - time.time())))
        step = plan.step_at(time.time() - run.start)
        return None if step >= plan.n_steps or run.over else step

    def _click(self, path: str, body: dict, st: StepStats) -> frozenset[str] | tuple[()]:
        """POST one click; record it in `st`; the item ids shown (empty when it failed)."""
        with self.client.post(path, json=body, name="click", catch_response=True) as resp:
            st.latencies_ms.append(float(resp.request_meta["response_time"]))
            error = _error_kind(resp)
            if error is None:
                try:
                    answer = resp.json()
                    shown = frozenset(str(it["item_id"]) for it in answer["items"])
                    served_by = str(answer["served_by"])
                    reason = answer.get("fallback_reason")
                except (ValueError, KeyError, TypeError):
                    error = "bad answer"
            if error is not None:
                st.errors[error] += 1
                resp.failure(error)
                return ()
            st.served_by[served_by] += 1
            st.fallback[NO_FALLBACK if reason is None else str(reason)] += 1
            resp.success()
            return shown


def _error_kind(resp) -> str | None:
    """A short kind for a failed request (the report counts by kind), None for a good one."""
    status = resp.status_code
    if status == 0 or status is None:
        err = getattr(resp, "error", None)
        name = type(err).__name__ if err is not None else "no answer"
        return "timeout" if "timeout" in name.lower() else f"connection: {name}"
    if not 200 <= status < 300:
        return f"http {status}"
    return None
