"""What recording the metrics costs a click, side by side with the click itself, in one run.

    python -m bench.metrics_overhead [--out reports/bench/metrics_overhead.json]

- recording: what the edge middleware records for one answered click (request duration and count,
  answer duration, model and store durations), through prometheus-client, timed in-process as the
  median of batches: with one worker (the library's in-memory values) and, in a child process, in
  the multi-process mode `cairn serve --workers N` uses (values in memory-mapped files);
- the click: the median latency of sequential clicks over loopback HTTP to `cairn serve` (one
  worker, memory store, a 40,000-item random artifact, as bench/service.py sets it up).
Target: recording under 3% of the click.
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from bench.harness.ports import free_port
from bench.harness.processes import launch, stop_process, wait_http
from bench.reporting import write_report

TARGET_SHARE = 0.03
BATCH = 2000


def recording_ns(rounds: int = 15) -> float:
    """Median ns to record one click's metrics, as EdgeMiddleware._record does."""
    from service.api.metrics import ServiceMetrics

    m = ServiceMetrics(multiprocess="PROMETHEUS_MULTIPROC_DIR" in os.environ)
    route, method = ("/v1/sessions/{session_id}/clicks", "POST")
    per_batch = []
    for _ in range(rounds):
        t0 = time.perf_counter_ns()
        for _ in range(BATCH):
            m.request_duration.observe((route, method), 0.0008)
            m.requests.inc((route, method, "200"))
            m.answer_duration.observe(("gru",), 0.0008)
            m.model_duration.observe(("gru",), 0.0004)
            m.store_duration.observe(("memory",), 0.00001)
        per_batch.append((time.perf_counter_ns() - t0) / BATCH)
    return statistics.median(per_batch)


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="python -m bench.metrics_overhead", description=__doc__.split("\n\n")[0])
    p.add_argument("--clicks", type=int, default=2000)
    p.add_argument("--items", type=int, default=40_000)
    p.add_argument("--out", type=Path, default=Path("reports/bench/metrics_overhead.json"))
    p.add_argument("--only-recording", action="store_true", help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.only_recording:  # the child process of the multi-process measurement
        print(recording_ns())
        return 0
    import uvloop

    from bench.service import click_stream, sequential_clicks
    from offline.export.artifact_writer import write_random_artifact

    single = recording_ns()
    with tempfile.TemporaryDirectory(prefix="cairn-bench-metrics-") as folder:
        child = subprocess.run(
            [sys.executable, "-m", "bench.metrics_overhead", "--only-recording"], capture_output=True, text=True, check=True,
            env={**os.environ, "PROMETHEUS_MULTIPROC_DIR": folder},
        )  # fmt: skip
        multi = float(child.stdout.strip().splitlines()[-1])
    work = Path(tempfile.mkdtemp(prefix="cairn-bench-metrics-"))
    write_random_artifact(work / "model_store", "bench", "v1", n_items=args.items, hidden_size=100)
    port = free_port()
    env = {k: v for k, v in os.environ.items() if not k.startswith("CAIRN_")}
    env.update(CAIRN_ARTIFACTS=str(work / "model_store"), CAIRN_LOG_LEVEL="warning", CAIRN_ORT_THREADS="1")
    proc = launch([sys.executable, "-m", "service.cli", "serve", "--port", str(port)], env=env, log_path=work / "serve.log")
    try:
        wait_http(proc, port, "/readyz", log_path=work / "serve.log")
        items = click_stream(args.items, seed=0)
        uvloop.run(sequential_clicks(port, items, 200))  # warm-up
        click_ms = statistics.median(uvloop.run(sequential_clicks(port, items[500:], args.clicks)))
    finally:
        stop_process(proc)
    report = {
        "recording_one_worker_us": round(single / 1e3, 2),
        "recording_multi_process_us": round(multi / 1e3, 2),
        "click_median_ms": round(click_ms, 4),
        "share_one_worker": round(single / 1e6 / click_ms, 4),
        "share_multi_process": round(multi / 1e6 / click_ms, 4),
        "target_share": TARGET_SHARE,
        "met": max(single, multi) / 1e6 / click_ms < TARGET_SHARE,
    }
    write_report(args.out, report)
    print(
        f"recording a click's metrics: {report['recording_one_worker_us']} us (one worker), "
        f"{report['recording_multi_process_us']} us (multi-process files); a click: {report['click_median_ms']} ms median; "
        f"share {report['share_one_worker']:.2%} / {report['share_multi_process']:.2%} (target < {TARGET_SHARE:.0%})"
    )
    return 0 if report["met"] else 1


if __name__ == "__main__":
    sys.exit(main())
