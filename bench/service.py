"""The recommendation service end to end over loopback HTTP, beside its floors measured in the same run.

    python -m bench.service [--out reports/bench/service.json]

Set-up: a random-weight artifact of 40,000 items, hidden size 100 (speed depends on sizes only);
`cairn serve` with one worker pinned to one core (taskset), ONNX Runtime on one thread; the load
generator (asyncio streams over keep-alive connections, uvloop) and redis-server on the other core.

Floors, each the least that part of a click can cost here (the redis and model floors are timed
from the server's core, as the service calls them):
- http: a minimal FastAPI + pydantic JSON endpoint on the same uvicorn/uvloop/httptools stack,
  same core, same load generator, a body and answer of the same size;
- redis: one GET and one SET round trip (redis-py asyncio, hiredis), as the store needs per click;
- model: one GRU step as the service runs it: the ONNX Runtime call that scored each click, timed
  inside the service (Server-Timing `step`) in the very run being measured. Between two clicks the
  service's own work pushes the 16 MB output matrix out of the caches, so the same call costs more
  there than in a tight loop; the tight-loop figure (the step batcher, batch of one, nothing in
  between) is measured and printed beside it.

(b) median latency of a click at concurrency 1, memory store and Redis, beside the sum of the
    floors that apply (target: within 1.5x);
(c) clicks per second at saturation with many concurrent visits, bounded in clicks and seconds
    (target: >= 1,200 clicks/s per worker with p99 under 25 ms).
"""

from __future__ import annotations

import argparse
import asyncio
import itertools
import os
import platform
import re
import shutil
import statistics
import sys
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from pydantic import BaseModel

from bench.harness.ports import free_port
from bench.reporting import write_report
from bench.harness.processes import launch, stop_all, stop_process, wait_http
from bench.harness.redis_process import RedisProcess
from service.errors import BenchError

TARGET_RATIO = 1.5
TARGET_CLICKS_PER_S = 1200.0
TARGET_P99_MS = 25.0
COUNT = 10


class Connection:
    """Minimal HTTP/1.1 keep-alive client on asyncio streams: the load generator must cost far less
    than the server, and a general client library on one core would be the bottleneck."""

    def __init__(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        self.reader, self.writer = reader, writer

    @classmethod
    async def open(cls, port: int) -> Connection:
        reader, writer = await asyncio.open_connection("127.0.0.1", port)
        return cls(reader, writer)

    async def post(self, path: str, body: bytes) -> tuple[int, bytes]:
        status, _, payload = await self.post_with_head(path, body)
        return status, payload

    async def post_with_head(self, path: str, body: bytes) -> tuple[int, bytes, bytes]:
        self.writer.write(
            b"POST %s HTTP/1.1\r\nHost: bench\r\nContent-Type: application/json\r\nContent-Length: %d\r\n\r\n%s"
            % (path.encode(), len(body), body)
        )
        head = await self.reader.readuntil(b"\r\n\r\n")
        status = int(head[9:12])
        m = re.search(rb"(?i)content-length: *(\d+)", head)
        payload = await self.reader.readexactly(int(m.group(1))) if m else b""
        return status, head, payload

    async def get(self, path: str) -> tuple[int, bytes]:
        self.writer.write(b"GET %s HTTP/1.1\r\nHost: bench\r\n\r\n" % path.encode())
        head = await self.reader.readuntil(b"\r\n\r\n")
        m = re.search(rb"(?i)content-length: *(\d+)", head)
        return int(head[9:12]), await self.reader.readexactly(int(m.group(1))) if m else b""

    def close(self) -> None:
        self.writer.close()


# -- the HTTP floor: the same stack with nothing behind it -----------------------------------------


class FloorClick(BaseModel):
    item_id: str
    count: int | None = None


def floor_app():  # pragma: no cover - runs in its own process
    from fastapi import FastAPI

    app = FastAPI()
    answer = {
        "session_id": "",
        "items": [{"item_id": f"sku-{i:06d}", "score": 0.123456789} for i in range(COUNT)],
        "served_by": "gru",
        "artifact_version": "bench/v1",
        "fallback_reason": None,
        "elapsed_ms": 0.1,
        "sequence": 1,
        "duplicate": False,
    }

    @app.post("/v1/sessions/{session_id}/clicks")
    async def click(session_id: str, body: FloorClick) -> dict:
        return {**answer, "session_id": session_id}

    return app


def serve_floor(port: int) -> None:  # pragma: no cover - runs in its own process
    import uvicorn

    uvicorn.run(floor_app(), host="127.0.0.1", port=port, loop="uvloop", http="httptools", log_level="warning", access_log=False)


# -- processes -------------------------------------------------------------------------------------


def bench_cores() -> list[int] | None:
    """The cores this process may use, or None (saying why) without two of them, taskset and redis-server."""
    cores = sorted(os.sched_getaffinity(0))
    if len(cores) < 2 or shutil.which("taskset") is None or shutil.which("redis-server") is None:
        print("needs two cores, taskset and redis-server", file=sys.stderr)
        return None
    return cores


def service_environment(model_store: Path, **settings: str) -> dict[str, str]:
    """This process's environment without CAIRN_ variables, plus the service's settings for a benchmark."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("CAIRN_")}
    env.update(CAIRN_ARTIFACTS=str(model_store), CAIRN_LOG_LEVEL="warning", CAIRN_ORT_THREADS="1", **settings)
    return env


def environment_info(cores: list[int], server_core: int, load_core: int, load_before: tuple[float, ...]) -> dict:
    return {
        "python": platform.python_version(),
        "machine": platform.machine(),
        "cores_available": len(cores),
        "server_core": server_core,
        "load_generator_core": load_core,
        "load_average_before": [round(x, 2) for x in load_before],
    }


@dataclass
class Rig:
    """What a service benchmark runs on: two cores (server, load), a random-weight artifact, clicks."""

    cores: list[int]
    server_core: int
    load_core: int
    load_before: tuple[float, ...]
    work: Path
    store: Path
    artifact: Path
    items: list[str]


def build_rig(prefix: str, n_items: int, hidden: int) -> Rig | None:
    """A `Rig` in a new temporary folder, or None (having said why) without two cores."""
    from offline.export.artifact_writer import write_random_artifact

    cores = bench_cores()
    if cores is None:
        return None
    load_before = os.getloadavg()
    work = Path(tempfile.mkdtemp(prefix=prefix))
    store = work / "model_store"
    artifact = write_random_artifact(store, "bench", "v1", n_items=n_items, hidden_size=hidden)
    return Rig(cores, cores[0], cores[1], load_before, work, store, artifact, click_stream(n_items, seed=0))


# -- measurements ----------------------------------------------------------------------------------


def click_stream(n_items: int, seed: int):
    """Item ids Zipf-like by rank, the shape of real click logs (common practice)."""
    rng = np.random.default_rng(seed)
    weights = 1.0 / np.arange(1, n_items + 1)
    ranks = rng.choice(n_items, size=200_000, p=weights / weights.sum())
    ids = rng.permutation(n_items)[ranks]
    return [f"sku-{i:06d}" for i in ids]


def pct(values: list[float], q: float) -> float:
    return float(np.percentile(np.asarray(values), q)) if values else float("nan")


async def sequential_clicks(port: int, items: list[str], n: int, sessions: int = 50, timings: dict | None = None) -> list[float]:
    """Latency in ms of n clicks one after another, round-robin over `sessions` visits.

    With `timings`, the server's own Server-Timing entries (store, model, total) are collected too.
    """
    conn = await Connection.open(port)
    out = []
    try:
        for k in range(n):
            body = b'{"item_id":"%s","count":%d}' % (items[k % len(items)].encode(), COUNT)
            t0 = time.perf_counter()
            status, head, _ = await conn.post_with_head(f"/v1/sessions/bench-c1-{k % sessions}/clicks", body)
            out.append((time.perf_counter() - t0) * 1e3)
            if status != 200:
                raise BenchError(f"click answered {status}")
            if timings is not None:
                for name, dur in re.findall(rb"(\w+);dur=([\d.]+)", head):
                    timings.setdefault(name.decode(), []).append(float(dur))
    finally:
        conn.close()
    return out


async def paced(
    port: int,
    click_of: Callable[[int, int], tuple[str, str]],
    rate: float,
    connections: int,
    max_clicks: int,
    max_seconds: float,
) -> dict:
    """Clicks open loop at `rate` per second, evenly spaced and spread over `connections` keep-alive
    connections (connection c sends the clicks due at start + (n * connections + c) / rate), each
    timed from when it was due, so an answer that comes late delays the next one's clock too (no
    coordinated omission, common practice). `click_of(c, n)` gives the n-th click of connection c as
    (session id, item id). Bounded by clicks and by time."""
    latencies: list[float] = []
    errors = 0
    conns = await asyncio.gather(*(Connection.open(port) for _ in range(connections)))  # before the clock starts
    start = time.perf_counter() + 0.05

    async def connection(c: int) -> None:
        nonlocal errors
        conn = conns[c]
        try:
            for n in itertools.count():
                slot = n * connections + c
                due = start + slot / rate
                if slot >= max_clicks or due >= start + max_seconds:
                    break
                delay = due - time.perf_counter()
                if delay > 0:
                    await asyncio.sleep(delay)
                session, item = click_of(c, n)
                body = b'{"item_id":"%s","count":%d}' % (item.encode(), COUNT)
                status, _ = await conn.post(f"/v1/sessions/{session}/clicks", body)
                latencies.append((time.perf_counter() - due) * 1e3)
                errors += status != 200
        finally:
            conn.close()

    await asyncio.gather(*(connection(c) for c in range(connections)))
    return {"clicks": len(latencies), "p50_ms": round(pct(latencies, 50), 2), "p99_ms": round(pct(latencies, 99), 2), "errors": errors}


async def saturate(port: int, items: list[str], concurrency: int, max_clicks: int, max_seconds: float, warmup_s: float) -> dict:
    """Many visits at once on `concurrency` connections; bounded by clicks and by time."""
    latencies: list[float] = []
    errors = 0
    state = {"recording": False, "done": False, "sent": 0}

    async def visitor(v: int) -> None:
        nonlocal errors
        conn = await Connection.open(port)
        k = v * 997
        try:
            while not state["done"]:
                session = f"bench-sat-{v}-{(k // 8) % 64}"  # visits of 8 clicks, 64 visits per connection
                body = b'{"item_id":"%s","count":%d}' % (items[k % len(items)].encode(), COUNT)
                k += 1
                t0 = time.perf_counter()
                status, _ = await conn.post(f"/v1/sessions/{session}/clicks", body)
                if state["recording"]:
                    latencies.append((time.perf_counter() - t0) * 1e3)
                    errors += status != 200
                    state["sent"] += 1
                    if state["sent"] >= max_clicks:
                        state["done"] = True
        finally:
            conn.close()

    tasks = [asyncio.create_task(visitor(v)) for v in range(concurrency)]
    await asyncio.sleep(warmup_s)
    state["recording"] = True
    t0 = time.perf_counter()
    while not state["done"] and time.perf_counter() - t0 < max_seconds:
        await asyncio.sleep(0.05)
    state["done"] = True
    elapsed = time.perf_counter() - t0
    await asyncio.gather(*tasks)
    return {
        "clicks": len(latencies),
        "seconds": round(elapsed, 3),
        "clicks_per_s": round(len(latencies) / elapsed, 1),
        "p50_ms": round(pct(latencies, 50), 3),
        "p99_ms": round(pct(latencies, 99), 3),
        "errors": errors,
    }


async def gru_batching(port: int) -> tuple[float, float]:
    conn = await Connection.open(port)
    try:
        _, text = await conn.get("/metrics")
    finally:
        conn.close()
    batches = float(re.search(rb"\ncairn_gru_batches (\S+)", text).group(1))
    clicks = float(re.search(rb"\ncairn_gru_batched_clicks (\S+)", text).group(1))
    return batches, clicks


async def redis_floor(url: str, n: int) -> list[float]:
    import redis.asyncio as aioredis

    client = aioredis.Redis.from_url(url)
    value = os.urandom(600)  # about the size of a session's encoded state
    out = []
    try:
        await client.set("bench:floor", value)
        for k in range(n):
            t0 = time.perf_counter()
            await client.get("bench:floor")
            await client.set("bench:floor", value)
            out.append((time.perf_counter() - t0) * 1e3)
    finally:
        await client.aclose()
    return out


async def model_floor(artifact_path: Path, n: int, top_n: int) -> list[float]:
    from service.runtime.batching import StepBatcher
    from service.runtime.onnx_step import OnnxStep

    step = OnnxStep(artifact_path / "step.onnx", threads=1)
    batcher = StepBatcher(step)
    batcher.start()
    rng = np.random.default_rng(1)
    hidden = np.zeros((step.layers, step.hidden_size), dtype=np.float32)
    out = []
    try:
        for _ in range(50):
            hidden, _, _ = await batcher.run(int(rng.integers(step.n_items)), hidden, top_n)
        for _ in range(n):
            item = int(rng.integers(step.n_items))
            t0 = time.perf_counter()
            hidden, _, _ = await batcher.run(item, hidden, top_n)
            out.append((time.perf_counter() - t0) * 1e3)
    finally:
        await batcher.close()
    return out


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--out", type=Path, default=Path("reports/bench/service.json"))
    p.add_argument("--items", type=int, default=40_000)
    p.add_argument("--hidden", type=int, default=100)
    p.add_argument("--sequential", type=int, default=1500, help="clicks at concurrency 1, per store")
    p.add_argument("--floor-calls", type=int, default=1500)
    p.add_argument("--concurrency", type=int, nargs="+", default=[8, 16, 32], help="concurrent visits at saturation, each level in turn")
    p.add_argument("--max-clicks", type=int, default=30_000)
    p.add_argument("--max-seconds", type=float, default=10.0)
    p.add_argument("--warmup-seconds", type=float, default=1.5)
    p.add_argument("--serve-floor", type=int, help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.serve_floor:
        serve_floor(args.serve_floor)
        return 0

    import uvloop

    rig = build_rig("cairn-bench-", args.items, args.hidden)
    if rig is None:
        return 2
    cores, server_core, load_core, load_before = rig.cores, rig.server_core, rig.load_core, rig.load_before
    work, store, artifact, items = rig.work, rig.store, rig.artifact, rig.items
    env = service_environment(store)
    redis_port = free_port()
    redis_url = f"redis://127.0.0.1:{redis_port}/0"
    redis_proc = RedisProcess(redis_port, core=load_core).start().proc
    procs = [redis_proc]
    results: dict = {}
    try:
        time.sleep(0.3)
        # Floors. The model floor runs on the server's core, as the service would run it.
        os.sched_setaffinity(0, {server_core})
        model_ms = uvloop.run(model_floor(artifact, args.floor_calls, COUNT + 10))
        redis_ms = uvloop.run(redis_floor(redis_url, args.floor_calls))
        os.sched_setaffinity(0, {load_core})
        floor_port = free_port()
        floor_proc = launch([sys.executable, "-m", "bench.service", "--serve-floor", str(floor_port)], core=server_core, env=env)
        procs.append(floor_proc)
        wait_http(floor_proc, floor_port, "/docs")
        uvloop.run(sequential_clicks(floor_port, items, 200))  # warm-up
        http_ms = uvloop.run(sequential_clicks(floor_port, items, args.floor_calls))
        stop_process(floor_proc)
        floors = {
            "http_ms": round(statistics.median(http_ms), 4),
            "redis_get_set_ms": round(statistics.median(redis_ms), 4),
            "model_step_tight_loop_ms": round(statistics.median(model_ms), 4),
        }
        results["floors_median_ms"] = floors
        results["latency_concurrency_1"] = {}
        results["saturation"] = {}
        for kind, store_setting in (("memory", "memory"), ("redis", redis_url)):
            port = free_port()
            proc = launch(
                [sys.executable, "-m", "service.cli", "serve", "--port", str(port), "--session-store", store_setting, "--workers", "1"],
                core=server_core,
                env={**env, "CAIRN_REDIS_PREFIX": f"bench-{kind}:"},
            )
            procs.append(proc)
            wait_http(proc, port, "/readyz")
            uvloop.run(sequential_clicks(port, items, 200))  # warm-up
            server_timing: dict[str, list[float]] = {}
            lat = uvloop.run(sequential_clicks(port, items[1000:], args.sequential, timings=server_timing))
            step_ms = statistics.median(server_timing["step"])  # the model floor, as this service ran it
            floor_sum = floors["http_ms"] + step_ms + (floors["redis_get_set_ms"] if kind == "redis" else 0.0)
            median = statistics.median(lat)
            results["latency_concurrency_1"][kind] = {
                "median_ms": round(median, 4),
                "p90_ms": round(pct(lat, 90), 4),
                "model_step_in_service_ms": round(step_ms, 4),
                "floor_sum_ms": round(floor_sum, 4),
                "ratio": round(median / floor_sum, 3),
                "target_ratio": TARGET_RATIO,
                "met": median / floor_sum <= TARGET_RATIO,
                "server_timing_median_ms": {k: round(statistics.median(v), 3) for k, v in server_timing.items()},
            }
            levels = []
            for concurrency in args.concurrency:
                b0, c0 = uvloop.run(gru_batching(port))
                sat = uvloop.run(saturate(port, items, concurrency, args.max_clicks, args.max_seconds, args.warmup_seconds))
                b1, c1 = uvloop.run(gru_batching(port))
                sat["mean_gru_batch"] = round((c1 - c0) / max(b1 - b0, 1.0), 2)
                sat["concurrency"] = concurrency
                sat["met"] = sat["clicks_per_s"] >= TARGET_CLICKS_PER_S and sat["p99_ms"] < TARGET_P99_MS and sat["errors"] == 0
                levels.append(sat)
            results["saturation"][kind] = {
                "target_clicks_per_s": TARGET_CLICKS_PER_S,
                "target_p99_ms": TARGET_P99_MS,
                "met_at_some_concurrency": any(level["met"] for level in levels),
                "levels": levels,
            }
            stop_process(proc)
    finally:
        stop_all(procs)
        shutil.rmtree(work, ignore_errors=True)

    report = {
        "benchmark": "service",
        "environment": environment_info(cores, server_core, load_core, load_before),
        "config": {"n_items": args.items, "hidden_size": args.hidden, "count": COUNT, "ort_threads": 1, "workers": 1},
        **results,
    }
    write_report(args.out, report)

    f = results["floors_median_ms"]
    print(
        f"floors (median ms): http {f['http_ms']:.3f}  redis GET+SET {f['redis_get_set_ms']:.3f}  "
        f"model step in a tight loop {f['model_step_tight_loop_ms']:.3f}"
    )
    for kind, r in results["latency_concurrency_1"].items():
        print(
            f"click at concurrency 1, {kind:6s}: median {r['median_ms']:.3f} ms  floors {r['floor_sum_ms']:.3f} ms "
            f"(model step in the service {r['model_step_in_service_ms']:.3f})  "
            f"ratio {r['ratio']:.2f} (target <= {TARGET_RATIO})  {'ok' if r['met'] else 'MISSED'}  "
            f"[server: {', '.join(f'{k} {v:.3f}' for k, v in r['server_timing_median_ms'].items())} ms]"
        )
    for kind, block in results["saturation"].items():
        for r in block["levels"]:
            print(
                f"saturation, {kind:6s}, {r['concurrency']:3d} visits at once: {r['clicks_per_s']:.0f} clicks/s  "
                f"p50 {r['p50_ms']:.2f} ms  p99 {r['p99_ms']:.2f} ms  mean GRU batch {r['mean_gru_batch']}  errors {r['errors']}  "
                f"(target >= {TARGET_CLICKS_PER_S:.0f}/s with p99 < {TARGET_P99_MS} ms)  {'ok' if r['met'] else 'MISSED'}"
            )
    print(f"report: {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
