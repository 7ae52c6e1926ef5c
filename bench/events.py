"""The click event log's cost under load: the same service with events off and on, side by side.

    python -m bench.events [--out reports/bench/events.json] [--rate 2000] [--rounds 6] [--round-seconds 8]

Set-up as bench/service.py: a random-weight artifact (default 3,000 items, the demo shop's size;
hidden size 100), `cairn serve` with one worker and the memory store, pinned to one core; the load
generator on the other. Two servers run the whole time, one with CAIRN_EVENTS=off and one writing
events to a folder; only one is loaded at a time. Load is open-loop at a fixed rate, spread over 16
connections. The default, 1,000 clicks/s, is what the shared 2-core development machine sustains
with room to spare (it saturates near 2,000); set --rate to the capacity `cairn capacity` measures
on yours (README "Load test and capacity": 3,000 clicks/s per core on a quiet machine);
latency counts from each click's scheduled time, so a stall is not hidden by sending later.
Rounds alternate off, on, off, on... so drift on the machine hits both alike.

Targets: no event dropped (cairn_events_dropped_total 0, and cairn_events_written_total equal to
the clicks answered), and the median over rounds of the p99 with events within 5% of without.
"""

from __future__ import annotations

import argparse
import re
import shutil
import statistics
import sys
from pathlib import Path

from bench.harness.ports import free_port
from bench.harness.processes import launch, stop_all, wait_http
from bench.reporting import write_report
from bench.service import Connection, build_rig, environment_info, paced, service_environment
from offline.online.event_source import read_events
from service.errors import BenchError

TARGET_P99_RATIO = 1.05
CONNECTIONS = 16


async def paced_round(port: int, items: list[str], rate: float, seconds: float, offset: int) -> dict:
    """`seconds` of clicks at `rate`, evenly spaced over CONNECTIONS connections, in visits of 8
    clicks (bench.service.paced); `offset` gives each round clicks and visits of its own."""

    def click_of(c: int, n: int) -> tuple[str, str]:
        k = offset + c * 7919 + n
        return f"ev-{offset}-{c}-{(k // 8) % 256}", items[k % len(items)]

    return await paced(port, click_of, rate, CONNECTIONS, max_clicks=int(rate * seconds) + CONNECTIONS, max_seconds=seconds)


async def event_counters(port: int) -> tuple[float, float]:
    conn = await Connection.open(port)
    try:
        _, text = await conn.get("/metrics")
    finally:
        conn.close()
    written = re.search(rb"\ncairn_events_written_total (\S+)", text)
    dropped = re.search(rb"\ncairn_events_dropped_total (\S+)", text)
    return float(written.group(1)) if written else 0.0, float(dropped.group(1)) if dropped else 0.0


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--out", type=Path, default=Path("reports/bench/events.json"))
    p.add_argument("--items", type=int, default=3_000, help="catalogue size (default 3,000: the demo shop)")
    p.add_argument("--hidden", type=int, default=100)
    p.add_argument("--rate", type=float, default=1000.0, help="clicks per second, open loop (default 1,000; set it to what `cairn capacity` measured)")
    p.add_argument("--rounds", type=int, default=6, help="rounds per variant, alternating")
    p.add_argument("--round-seconds", type=float, default=5.0)
    args = p.parse_args(argv)
    if args.rounds < 1 or not 0 < args.rate <= 50_000 or not 0 < args.round_seconds <= 120:
        raise SystemExit("bench.events: --rounds >= 1, --rate in (0, 50000], --round-seconds in (0, 120]")
    import os

    import uvloop

    rig = build_rig("cairn-bench-events-", args.items, args.hidden)
    if rig is None:
        return 2
    allowed = os.sched_getaffinity(0)
    os.sched_setaffinity(0, {rig.load_core})
    events_dir = rig.work / "events"
    procs = []
    ports = {}
    warm: dict[str, int] = {}
    try:
        for variant, events in (("off", "off"), ("on", str(events_dir))):
            port = free_port()
            proc = launch(
                [sys.executable, "-m", "service.cli", "serve", "--port", str(port)],
                core=rig.server_core, env=service_environment(rig.store, CAIRN_EVENTS=events),
                log_path=rig.work / f"serve-{variant}.log",
            )  # fmt: skip
            procs.append(proc)
            wait_http(proc, port, "/readyz")
            warm[variant] = uvloop.run(paced_round(port, rig.items, args.rate / 4, 1.0, offset=999_999))["clicks"]
            ports[variant] = port
        rounds: dict[str, list[dict]] = {"off": [], "on": []}
        for r in range(args.rounds):
            for variant in (("off", "on") if r % 2 == 0 else ("on", "off")):
                result = uvloop.run(paced_round(ports[variant], rig.items, args.rate, args.round_seconds, offset=r * 100_000))
                rounds[variant].append(result)
                print(f"round {r + 1} {variant:>3}: {result['clicks']} clicks, p50 {result['p50_ms']:.2f} ms, p99 {result['p99_ms']:.2f} ms")
        written, dropped = uvloop.run(event_counters(ports["on"]))
        stop_all(procs)  # SIGTERM: the events server flushes what it holds
        answered_on = sum(x["clicks"] for x in rounds["on"]) + warm["on"]
        in_folder = len(read_events(str(events_dir)).events)
    finally:
        stop_all(procs)
        shutil.rmtree(rig.work, ignore_errors=True)
        os.sched_setaffinity(0, allowed)  # this process (a test's, say) keeps the cores it had
    summary = {}
    for variant in ("off", "on"):
        summary[variant] = {
            "p99_ms_median": round(statistics.median(x["p99_ms"] for x in rounds[variant]), 3),
            "p50_ms_median": round(statistics.median(x["p50_ms"] for x in rounds[variant]), 3),
            "errors": sum(x["errors"] for x in rounds[variant]),
        }
    ratio = summary["on"]["p99_ms_median"] / summary["off"]["p99_ms_median"]
    report = {
        "environment": environment_info(rig.cores, rig.server_core, rig.load_core, rig.load_before),
        "rate_per_s": args.rate,
        "rounds": rounds,
        "summary": summary,
        "p99_ratio_on_over_off": round(ratio, 4),
        "events_dropped": dropped,
        "events_written_before_stop": written,
        "events_in_folder": in_folder,
        "clicks_answered_with_events": answered_on,
        "met": ratio <= TARGET_P99_RATIO and dropped == 0 and in_folder == answered_on,
    }
    write_report(args.out, report)
    print(f"\n{'':>4} {'p50 ms':>8} {'p99 ms':>8}")
    for variant in ("off", "on"):
        print(f"{variant:>4} {summary[variant]['p50_ms_median']:>8.2f} {summary[variant]['p99_ms_median']:>8.2f}")
    print(f"p99 with events / without: {ratio:.3f} (target <= {TARGET_P99_RATIO}); dropped {dropped:.0f}; "
          f"events in the folder {in_folder} of {answered_on} clicks answered; wrote {args.out}")  # fmt: skip
    if not report["met"]:
        print("target NOT met", file=sys.stderr)
    return 0


if __name__ == "__main__":
    try:
        sys.exit(main())
    except BenchError as exc:
        print(f"bench.events: {exc}", file=sys.stderr)
        sys.exit(2)
