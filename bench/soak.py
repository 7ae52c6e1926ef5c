"""The soak: a long run at a steady share of capacity while Redis restarts and the model switches.

    python -m bench.soak [--minutes 10] [--rate 300] [--out reports/bench/soak.json]   (make soak)

`cairn serve --workers 2` on a real redis-server (append-only file, fsync always, so what Redis
acknowledged survives its restart), two random-weight artifacts of the demo's size. Visitors click
at `--rate` clicks/s (set it to about 70% of the capacity `cairn capacity` measured), each click with
an event_id. Every `--redis-every` seconds Redis is killed and started again; every `--switch-every`
seconds the serving artifact flips between v1 and v2 through `PUT /v1/serving`. At the end:

- 5xx answers (must be 0);
- acknowledged clicks lost: for every visit, the highest sequence answered `recorded: yes` against
  what Redis holds (must be 0);
- RSS of the service's processes after the warm-up and at the end (growth must stay under 5%).
Not part of `make test` or `make bench`: it takes its minutes on purpose.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import signal
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

from bench.harness.ports import free_port
from bench.harness.processes import launch, stop_process, wait_http
from bench.harness.redis_process import RedisProcess
from bench.reporting import write_report

TOKEN = "soak-admin-token-0123456789"
VISITS = 400
VISIT_LENGTH = 12


def rss_bytes(root_pid: int) -> int:
    """Resident memory of a process and its children (Linux /proc), in bytes."""
    total = 0
    pids = [root_pid]
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            try:
                fields = (entry / "stat").read_text().rsplit(")", 1)[1].split()
                if int(fields[1]) == root_pid:  # ppid
                    pids.append(int(entry.name))
            except (OSError, IndexError, ValueError):
                continue
    for pid in pids:
        try:
            for line in Path(f"/proc/{pid}/status").read_text().splitlines():
                if line.startswith("VmRSS:"):
                    total += int(line.split()[1]) * 1024
        except OSError:
            continue
    return total


async def load(port: int, rate: float, seconds: float, acknowledged: dict[str, int], counts: dict[str, int]) -> None:
    """Clicks at `rate`/s over VISITS visits (each VISIT_LENGTH clicks, then a new visit), keep-alive connections."""
    from bench.service import Connection

    interval = 1.0 / rate
    deadline = time.monotonic() + seconds
    conns: list[Connection | None] = [None] * 32
    sequence = [0] * 32

    async def one(slot: int, n: int) -> None:
        session = f"soak-{slot}-{n // VISIT_LENGTH}"
        body = json.dumps({"item_id": f"sku-{(slot * 97 + n * 13) % 3000:06d}", "event_id": f"{slot}-{n}"}).encode()
        try:
            if conns[slot] is None:
                conns[slot] = await Connection.open(port)
            status, payload = await asyncio.wait_for(conns[slot].post(f"/v1/sessions/{session}/clicks", body), 10)
        except (OSError, asyncio.IncompleteReadError, asyncio.TimeoutError, ValueError):
            counts["transport_errors"] += 1
            if conns[slot] is not None:
                conns[slot].close()
            conns[slot] = None
            return
        counts[f"http_{status}"] = counts.get(f"http_{status}", 0) + 1
        if status == 200:
            answer = json.loads(payload)
            counts[f"recorded_{answer['recorded']}"] = counts.get(f"recorded_{answer['recorded']}", 0) + 1
            if answer["recorded"] == "yes":
                acknowledged[session] = max(acknowledged.get(session, 0), answer["sequence"])

    busy = [False] * 32
    n = 0
    next_at = time.monotonic()
    tasks: set[asyncio.Task] = set()
    while time.monotonic() < deadline:
        await asyncio.sleep(max(0.0, next_at - time.monotonic()))
        next_at += interval
        free = [s for s in range(32) if not busy[s]]
        if not free:
            counts["skipped_slots"] += 1
            continue
        slot = free[n % len(free)]
        busy[slot] = True
        sequence[slot] += 1

        async def run(slot: int = slot, k: int = sequence[slot]) -> None:
            try:
                await one(slot, k)
            finally:
                busy[slot] = False

        task = asyncio.create_task(run())
        tasks.add(task)
        task.add_done_callback(tasks.discard)
        n += 1
    await asyncio.gather(*tasks)
    for c in conns:
        if c is not None:
            c.close()


def switch(port: int, version: str) -> int:
    request = urllib.request.Request(
        f"http://127.0.0.1:{port}/v1/serving", data=json.dumps({"name": "soak", "version": version}).encode(), method="PUT",
        headers={"Content-Type": "application/json", "Authorization": f"Bearer {TOKEN}"},
    )  # fmt: skip
    try:
        with urllib.request.urlopen(request, timeout=30) as resp:
            return resp.status
    except urllib.error.HTTPError as exc:
        return exc.code
    except OSError:
        return 0


async def soak(args: argparse.Namespace, port: int, service_pid: int, redis: RedisProcess) -> dict:
    acknowledged: dict[str, int] = {}
    counts: dict[str, int] = {"transport_errors": 0, "skipped_slots": 0}
    # Warm-up: both artifacts served once (a switch loads one), so the start RSS already holds what a
    # steady state holds and the growth measured is what the hours would add.
    for version in ("v2", "v1"):
        await asyncio.to_thread(switch, port, version)
        await load(port, args.rate, 10.0, {}, {"transport_errors": 0, "skipped_slots": 0})
    rss_start = rss_bytes(service_pid)
    events: list[dict] = []
    started = time.monotonic()
    total_s = args.minutes * 60.0
    runner = asyncio.create_task(load(port, args.rate, total_s, acknowledged, counts))
    next_redis, next_switch, version = args.redis_every, args.switch_every, "v1"
    while not runner.done():
        await asyncio.sleep(0.5)
        elapsed = time.monotonic() - started
        if elapsed >= next_redis and elapsed < total_s - 5:
            redis.kill()
            await asyncio.sleep(1.0)
            redis.start()
            events.append({"at_s": round(elapsed, 1), "event": "redis restarted"})
            next_redis += args.redis_every
        if elapsed >= next_switch and elapsed < total_s - 5:
            version = "v2" if version == "v1" else "v1"
            status = await asyncio.to_thread(switch, port, version)
            events.append({"at_s": round(elapsed, 1), "event": f"switch to {version}", "status": status})
            next_switch += args.switch_every
    await runner
    rss_end = rss_bytes(service_pid)
    import redis as redis_client

    client = redis_client.Redis.from_url(redis.url)
    lost = 0
    try:
        from service.store.state import decode

        for session, sequence in acknowledged.items():
            raw = client.get(f"soak:s:{session}")
            if raw is None or decode(raw, session).sequence < sequence:
                lost += 1
    finally:
        client.close()
    five_xx = sum(v for k, v in counts.items() if k.startswith("http_5"))
    return {
        "minutes": args.minutes,
        "rate": args.rate,
        "counts": counts,
        "events": events,
        "visits_checked": len(acknowledged),
        "acknowledged_lost": lost,
        "five_xx": five_xx,
        "rss_start_mb": round(rss_start / 2**20, 1),
        "rss_end_mb": round(rss_end / 2**20, 1),
        "rss_growth": round(rss_end / rss_start - 1, 4) if rss_start else None,
        "met": five_xx == 0 and lost == 0 and rss_start > 0 and rss_end / rss_start - 1 < 0.05,
    }


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="python -m bench.soak", description=__doc__.split("\n\n")[0])
    p.add_argument("--minutes", type=float, default=10.0)
    p.add_argument("--rate", type=float, default=300.0, help="clicks/s: about 70%% of the measured capacity")
    p.add_argument("--redis-every", type=float, default=120.0, help="seconds between Redis restarts")
    p.add_argument("--switch-every", type=float, default=60.0, help="seconds between model switches")
    p.add_argument("--out", type=Path, default=Path("reports/bench/soak.json"))
    args = p.parse_args(argv)
    import uvloop

    from offline.export.artifact_writer import write_random_artifact

    work = Path(tempfile.mkdtemp(prefix="cairn-soak-"))
    for v, seed in (("v1", 0), ("v2", 1)):
        write_random_artifact(work / "model_store", "soak", v, n_items=3000, hidden_size=100, seed=seed)
    redis = RedisProcess(free_port(), "--appendonly", "yes", "--appendfsync", "always", "--dir", str(work)).start()
    port = free_port()
    env = {k: v for k, v in os.environ.items() if not k.startswith("CAIRN_")}
    env.update(
        CAIRN_ARTIFACTS=str(work / "model_store"), CAIRN_ARTIFACT_NAME="soak", CAIRN_ARTIFACT_VERSION="v1",
        CAIRN_SESSION_STORE=redis.url, CAIRN_REDIS_PREFIX="soak:", CAIRN_ADMIN_TOKEN=TOKEN, CAIRN_LOG_LEVEL="warning",
    )  # fmt: skip
    proc = launch([sys.executable, "-m", "service.cli", "serve", "--port", str(port), "--workers", "2"], env=env,
                  log_path=work / "serve.log", group=True)  # fmt: skip
    try:
        wait_http(proc, port, "/readyz", log_path=work / "serve.log")
        report = uvloop.run(soak(args, port, proc.pid, redis))
    finally:
        stop_process(proc)
        redis.stop()
    write_report(args.out, report)
    print(json.dumps({k: v for k, v in report.items() if k != "events"}, indent=2))
    print(f"soak {'met' if report['met'] else 'NOT met'}; wrote {args.out}")
    return 0 if report["met"] else 1


if __name__ == "__main__":
    signal.signal(signal.SIGTERM, signal.default_int_handler)
    sys.exit(main())
