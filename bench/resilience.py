"""The page budget under a slow model, and what the guards cost when nothing is wrong.

    python -m bench.resilience [--out reports/bench/resilience.json]

Set-up as in service/bench/service.py: a random-weight artifact of 40,000 items, hidden size 100;
`cairn`'s app on uvicorn (uvloop, httptools), one worker pinned to one core, ONNX Runtime on one
thread; the load generator (asyncio streams, uvloop) and redis-server on the other core. Sessions
in Redis. Servers are started by this module (`--serve`) so that a model can be slowed by a small
wrapper class passed to the app factory, as the fault tests do.

(a) slow model: every GRU step takes --step-delay-ms (default 200 ms, four times the 50 ms default
    budget). Clicks are paced open-loop at --rate per second (default 200) over many visits,
    bounded by --requests and --max-seconds; each answer's time is measured from when it was due
    to be sent, so a lagging generator cannot hide latency (no coordinated omission). Target: the
    99th percentile within budget + 5 ms, with the guards' default settings (the first clicks wait
    for the deadline, the breaker opens, trial calls every cool-down wait for it again).
(b) healthy model: the same service with CAIRN_GUARDS=true and CAIRN_GUARDS=false, both running,
    clicked in turn one request at a time (interleaved, so drift on the machine hits both alike),
    memory store and Redis. Target: the guarded median within 5% of the unguarded one.
"""

from __future__ import annotations

import argparse
import asyncio
import gc
import json
import os
import shutil
import statistics
import sys
import time
from pathlib import Path

from bench.service import (
    Connection,
    build_rig,
    environment_info,
    pct,
    service_environment,
)
from bench.reporting import write_report
from bench.harness.ports import free_port
from bench.harness.processes import launch, stop_all, stop_process, wait_http
from bench.harness.redis_process import RedisProcess
from service.errors import BenchError
from bench.faults import DelayedGru

TARGET_SLACK_MS = 5.0
TARGET_OVERHEAD = 1.05
COUNT = 10


def serve(port: int, delay_ms: float) -> None:  # pragma: no cover - runs in its own process
    import uvicorn

    from service.api.app import create_app
    from service.config import load_settings

    wrap = None if delay_ms <= 0 else (lambda inner: DelayedGru(inner, delay_ms / 1e3))
    app = create_app(load_settings(), wrap_model=wrap)
    # Keep-alive longer than a run: the load generator keeps idle connections in a pool.
    uvicorn.run(
        app, host="127.0.0.1", port=port, loop="uvloop", http="httptools", log_level="warning", access_log=False, lifespan="on",
        timeout_keep_alive=120,
    )  # fmt: skip


async def open_loop(port: int, items: list[str], rate: float, max_requests: int, max_seconds: float, visits: int) -> dict:
    """Clicks due at fixed intervals whatever the answers do; each timed from when it was due."""
    idle = [await Connection.open(port) for _ in range(32)]
    opened_late = 0
    latencies: list[float] = []
    took: list[float] = []
    reasons: dict[str, int] = {}
    statuses: dict[int, int] = {}
    pending: set[asyncio.Task] = set()

    async def one(k: int, due: float) -> None:
        nonlocal opened_late
        if idle:
            conn = idle.pop()
        else:
            conn = await Connection.open(port)
            opened_late += 1
        body = b'{"item_id":"%s","count":%d}' % (items[k % len(items)].encode(), COUNT)
        try:
            status, payload = await conn.post(f"/v1/sessions/bench-slow-{k % visits}/clicks", body)
        except (OSError, asyncio.IncompleteReadError):
            status, payload = -1, b""  # counted as an error; the connection is dropped
            conn.close()
        else:
            idle.append(conn)
        latencies.append((time.perf_counter() - due) * 1e3)
        statuses[status] = statuses.get(status, 0) + 1
        if status == 200:
            answer = json.loads(payload)
            took.append(answer["elapsed_ms"])
            reason = answer["fallback_reason"] or "none"
            reasons[reason] = reasons.get(reason, 0) + 1

    t0 = time.perf_counter()
    behind = 0.0
    k = 0
    while k < max_requests and time.perf_counter() - t0 < max_seconds:
        due = t0 + k / rate
        wait = due - time.perf_counter()
        if wait > 0:
            await asyncio.sleep(wait)
        else:
            behind = max(behind, -wait)
        task = asyncio.create_task(one(k, due))
        pending.add(task)
        task.add_done_callback(pending.discard)
        k += 1
    await asyncio.gather(*pending)
    elapsed = time.perf_counter() - t0
    for conn in idle:
        conn.close()
    return {
        "requests": len(latencies),
        "seconds": round(elapsed, 3),
        "offered_rate": rate,
        "achieved_rate": round(len(latencies) / elapsed, 1),
        "p50_ms": round(pct(latencies, 50), 3),
        "p99_ms": round(pct(latencies, 99), 3),
        "max_ms": round(max(latencies), 3),
        "server_took_p99_ms": round(pct(took, 99), 3),
        "statuses": statuses,
        "fallback_reasons": reasons,
        "generator_most_behind_ms": round(behind * 1e3, 3),
        "connections_opened_during_run": opened_late,
    }


async def warm_up(port: int, clicks: int = 300, concurrency: int = 16) -> None:
    """Clicks on items the model does not know: the HTTP stack, the Redis pool's connections and the
    store path get warm, and the model is never called (its breaker must start the run closed)."""

    async def visitor(v: int) -> None:
        conn = await Connection.open(port)
        try:
            for k in range(v, clicks, concurrency):
                status, _ = await conn.post(f"/v1/sessions/bench-warm-{k % 40}/clicks", b'{"item_id":"not-an-item-%d"}' % k)
                if status != 200:
                    raise BenchError(f"warm-up click answered {status}")
        finally:
            conn.close()

    await asyncio.gather(*(visitor(v) for v in range(concurrency)))


async def interleaved(ports: dict[str, int], items: list[str], n: int, visits: int = 50) -> dict[str, list[float]]:
    """n clicks on each server, one request at a time, alternating between them."""
    conns = {name: await Connection.open(port) for name, port in ports.items()}
    out: dict[str, list[float]] = {name: [] for name in ports}
    try:
        for k in range(n):
            body = b'{"item_id":"%s","count":%d}' % (items[k % len(items)].encode(), COUNT)
            order = list(conns.items()) if k % 2 == 0 else list(reversed(conns.items()))  # neither always goes first
            for name, conn in order:
                t0 = time.perf_counter()
                status, _ = await conn.post(f"/v1/sessions/bench-i-{k % visits}/clicks", body)
                out[name].append((time.perf_counter() - t0) * 1e3)
                if status != 200:
                    raise BenchError(f"{name}: click answered {status}")
    finally:
        for conn in conns.values():
            conn.close()
    return out


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--out", type=Path, default=Path("reports/bench/resilience.json"))
    p.add_argument("--items", type=int, default=40_000)
    p.add_argument("--hidden", type=int, default=100)
    p.add_argument("--budget-ms", type=int, default=50, help="the service's default budget (CAIRN_DEFAULT_BUDGET_MS)")
    p.add_argument("--step-delay-ms", type=float, default=200.0, help="added to every GRU step in (a)")
    p.add_argument("--rate", type=float, default=200.0, help="clicks per second in (a), open loop")
    p.add_argument("--requests", type=int, default=3000, help="most clicks in (a)")
    p.add_argument("--max-seconds", type=float, default=15.0, help="longest run of (a)")
    p.add_argument("--interleaved", type=int, default=3000, help="clicks per service and store in (b)")
    p.add_argument("--serve", type=int, help=argparse.SUPPRESS)
    p.add_argument("--delay-ms", type=float, default=0.0, help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.serve:
        serve(args.serve, args.delay_ms)
        return 0

    import uvloop

    rig = build_rig("cairn-bench-resilience-", args.items, args.hidden)
    if rig is None:
        return 2
    cores, server_core, load_core, load_before = rig.cores, rig.server_core, rig.load_core, rig.load_before
    work, store, items = rig.work, rig.store, rig.items
    env = service_environment(store, CAIRN_DEFAULT_BUDGET_MS=str(args.budget_ms))
    redis_port = free_port()
    redis_url = f"redis://127.0.0.1:{redis_port}/0"
    procs = [RedisProcess(redis_port, core=load_core).start().proc]
    os.sched_setaffinity(0, {load_core})
    # The generator has torch and the click list in memory: freeze them out of the cyclic GC, whose
    # full passes over them would stall the generator for tens of milliseconds mid-run.
    gc.collect()
    gc.freeze()

    def server(name: str, store_url: str, guards: bool, delay_ms: float = 0.0) -> int:
        port = free_port()
        cmd = [sys.executable, "-m", "bench.resilience", "--serve", str(port), "--delay-ms", str(delay_ms)]
        proc = launch(cmd, core=server_core, env={**env, "CAIRN_SESSION_STORE": store_url, "CAIRN_GUARDS": str(guards).lower(), "CAIRN_REDIS_PREFIX": f"{name}:"})
        procs.append(proc)
        wait_http(proc, port, "/healthz")
        return port

    results: dict = {}
    try:
        time.sleep(0.3)
        # (a) a model slowed past the budget, open-loop load.
        # Warm-up without the model: slow clicks would open the breaker before the run, and the run
        # must show the slowness arriving (loading the artifact already ran one step of the graph).
        port = server("slow", redis_url, True, args.step_delay_ms)
        uvloop.run(warm_up(port))
        slow = uvloop.run(open_loop(port, items, args.rate, args.requests, args.max_seconds, visits=400))
        slow["budget_ms"] = args.budget_ms
        slow["step_delay_ms"] = args.step_delay_ms
        slow["target_p99_ms"] = args.budget_ms + TARGET_SLACK_MS
        slow["met"] = slow["p99_ms"] <= args.budget_ms + TARGET_SLACK_MS and set(slow["statuses"]) == {200}
        results["slow_model"] = slow
        stop_process(procs.pop())

        # (b) a healthy model: guards on against guards off, interleaved.
        results["overhead"] = {}
        for kind, store_url in (("memory", "memory"), ("redis", redis_url)):
            ports = {"guards_on": server(f"on-{kind}", store_url, True), "guards_off": server(f"off-{kind}", store_url, False)}
            uvloop.run(interleaved(ports, items[7000:], 300))  # warm-up
            lat = uvloop.run(interleaved(ports, items[9000:], args.interleaved))
            on, off = statistics.median(lat["guards_on"]), statistics.median(lat["guards_off"])
            results["overhead"][kind] = {
                "clicks_each": args.interleaved,
                "median_on_ms": round(on, 4),
                "median_off_ms": round(off, 4),
                "ratio": round(on / off, 4),
                "p90_on_ms": round(pct(lat["guards_on"], 90), 4),
                "p90_off_ms": round(pct(lat["guards_off"], 90), 4),
                "target_ratio": TARGET_OVERHEAD,
                "met": on / off < TARGET_OVERHEAD,
            }
            stop_process(procs.pop())
            stop_process(procs.pop())
    finally:
        stop_all(procs)
        shutil.rmtree(work, ignore_errors=True)

    report = {
        "benchmark": "resilience",
        "environment": environment_info(cores, server_core, load_core, load_before),
        "config": {"n_items": args.items, "hidden_size": args.hidden, "count": COUNT, "workers": 1, "store": "redis"},
        **results,
    }
    write_report(args.out, report)

    s = results["slow_model"]
    print(
        f"slow model ({s['step_delay_ms']:.0f} ms a step, budget {s['budget_ms']} ms), {s['requests']} clicks open-loop at "
        f"{s['offered_rate']:.0f}/s (achieved {s['achieved_rate']:.0f}/s): p50 {s['p50_ms']:.2f} ms  p99 {s['p99_ms']:.2f} ms  "
        f"max {s['max_ms']:.2f} ms  (target p99 <= {s['target_p99_ms']:.0f} ms)  {'ok' if s['met'] else 'MISSED'}"
    )
    print(f"  statuses {s['statuses']}  fallback reasons {s['fallback_reasons']}  generator at most {s['generator_most_behind_ms']:.2f} ms behind")
    for kind, r in results["overhead"].items():
        print(
            f"healthy model, {kind:6s}: median guards on {r['median_on_ms']:.4f} ms  off {r['median_off_ms']:.4f} ms  "
            f"ratio {r['ratio']:.4f} (target < {TARGET_OVERHEAD})  {'ok' if r['met'] else 'MISSED'}"
        )
    print(f"report: {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
