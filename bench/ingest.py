"""Benchmark of `cairn prepare`: time and peak memory on a synthetic click log.

    python -m bench.ingest [--clicks 10000000] [--repeat 3] [--out reports/bench/ingest.json]

Writes a synthetic CSV (its own numpy generator: Zipf-like item popularity, sessions of a few
clicks, ISO 8601 times over two weeks, rows in time order as a web log has them), then runs
`cairn prepare` on it in a child process, `--repeat` times, and reports the median wall time,
clicks per second and the child's peak resident memory beside the targets.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import polars as pl

TARGET_SECONDS = 30.0  # for 10 million clicks on the 2-core reference machine
TARGET_PEAK_BYTES = 3 * 1024**3
_START_MS = 1_396_310_400_000  # 2014-04-01T00:00:00Z
_SPAN_MS = 14 * 86_400_000


def write_synthetic_log(path: Path, n_clicks: int, seed: int = 0) -> dict[str, int]:
    """A click log with columns session_id, item_id, timestamp; returns its sizes."""
    rng = np.random.default_rng(seed)
    # Session lengths 1, 2, 3, ... with probability falling geometrically (mean about 2.9); some
    # of length 1, so the session filter has work to do.
    lengths = rng.geometric(0.35, n_clicks // 2 + 1)  # [more sessions than needed]
    ends = np.cumsum(lengths)
    n_sessions = int(np.searchsorted(ends, n_clicks)) + 1
    lengths = lengths[:n_sessions]
    lengths[-1] -= int(ends[n_sessions - 1] - n_clicks)  # the total is exactly n_clicks
    # Zipf-like popularity over many items: the long tail has items below the 5-click threshold.
    n_items = max(100, n_clicks // 50)
    weight = 1.0 / (np.arange(n_items) + 10.0) ** 1.05
    cdf = np.cumsum(weight) / weight.sum()
    items = np.searchsorted(cdf, rng.random(n_clicks)).astype(np.int64)  # [n_clicks]
    session = np.repeat(np.arange(n_sessions, dtype=np.int64), lengths)  # [n_clicks]
    first = np.concatenate([[0], np.cumsum(lengths)[:-1]])  # [n_sessions], offset of each session
    gaps = rng.exponential(45_000.0, n_clicks).astype(np.int64)  # ms between clicks of a session
    gaps[first] = 0
    elapsed = np.cumsum(gaps)
    elapsed -= np.repeat(elapsed[first], lengths)  # ms since the session's first click
    start = rng.integers(0, _SPAN_MS, n_sessions) + _START_MS  # [n_sessions]
    t = elapsed + np.repeat(start, lengths)  # [n_clicks], epoch ms
    order = np.argsort(t, kind="stable")  # a web log is written in time order
    frame = pl.DataFrame(
        {
            "session_id": session[order] + 1_000_000,
            "item_id": items[order] + 500_000,
            "timestamp": pl.Series(t[order]).cast(pl.Datetime("ms")),
        }
    )
    frame.write_csv(path, datetime_format="%Y-%m-%dT%H:%M:%S%.3fZ")
    return {"clicks": n_clicks, "sessions": n_sessions, "items": n_items, "bytes": path.stat().st_size}


def _measured_run(log: Path, out: Path) -> tuple[float, int, str]:
    """Run `cairn prepare` in a child process: (wall seconds, the child's peak RSS in bytes, its stdout)."""
    cmd = [
        sys.executable, "-m", "service.cli", "prepare", "--input", str(log), "--out", str(out),
        "--session-column", "session_id", "--item-column", "item_id", "--time-column", "timestamp",
    ]
    with tempfile.TemporaryFile() as stdout, tempfile.TemporaryFile() as stderr:
        t0 = time.perf_counter()
        child = subprocess.Popen(cmd, stdout=stdout, stderr=stderr)
        # wait4 returns this child's own resource usage, so nothing else in this process counts.
        _, status, usage = os.wait4(child.pid, 0)
        wall = time.perf_counter() - t0
        child.returncode = os.waitstatus_to_exitcode(status)  # reaped here; Popen must not wait again
        stdout.seek(0)
        stderr.seek(0)
        if child.returncode != 0:
            sys.stderr.write(stderr.read().decode("utf-8", "replace"))
            raise SystemExit(f"cairn prepare failed with exit code {child.returncode}")
        text = stdout.read().decode("utf-8", "replace")
    peak = usage.ru_maxrss * (1 if sys.platform == "darwin" else 1024)  # getrusage(2): kilobytes on Linux
    return wall, peak, text


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m bench.ingest", description=__doc__.splitlines()[0])
    parser.add_argument("--clicks", type=int, default=10_000_000, help="size of the synthetic log (default 10 million)")
    parser.add_argument("--repeat", type=int, default=3, help="runs of the prepare step; the median is reported (default 3)")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--out", type=Path, default=Path("reports/bench/ingest.json"))
    args = parser.parse_args(argv)
    if args.clicks < 1000 or args.repeat < 1:
        parser.error("--clicks must be at least 1000 and --repeat at least 1")

    with tempfile.TemporaryDirectory(prefix="cairn-bench-ingest-") as tmp:
        log = Path(tmp) / "clicks.csv"
        t0 = time.perf_counter()
        sizes = write_synthetic_log(log, args.clicks, args.seed)
        print(f"synthetic log: {sizes['clicks']:,} clicks, {sizes['sessions']:,} sessions, "
              f"{sizes['items']:,} items, {sizes['bytes'] / 1e6:.0f} MB ({time.perf_counter() - t0:.1f} s to write)")
        runs = []
        for i in range(args.repeat):
            wall, peak, table = _measured_run(log, Path(tmp) / f"prepared-{i}")
            if i == 0:
                print(table)
            runs.append({"seconds": wall, "peak_rss_bytes": peak})
            print(f"run {i + 1}: {wall:.2f} s, peak {peak / 1024**3:.2f} GiB")
        report_file = Path(tmp) / "prepared-0" / "prepare_report.json"
        prepare_report = json.loads(report_file.read_text(encoding="utf-8"))

    seconds = statistics.median(r["seconds"] for r in runs)
    peak = max(r["peak_rss_bytes"] for r in runs)
    scale = args.clicks / 10_000_000  # targets are stated for 10 million clicks
    result = {
        "clicks": args.clicks,
        "log": sizes,
        "runs": runs,
        "median_seconds": seconds,
        "clicks_per_second": args.clicks / seconds,
        "peak_rss_bytes": peak,
        "target_seconds": TARGET_SECONDS * scale,
        "target_peak_rss_bytes": TARGET_PEAK_BYTES,
        "time_ratio_to_target": seconds / (TARGET_SECONDS * scale),
        "memory_ratio_to_target": peak / TARGET_PEAK_BYTES,
        "cpu_count": os.cpu_count(),
        "python": platform.python_version(),
        "polars": pl.__version__,
        "prepared": {k: prepare_report["splits"][k] for k in ("train", "valid", "test")},
    }
    ok_time = seconds < TARGET_SECONDS * scale
    ok_mem = peak < TARGET_PEAK_BYTES
    gib = 1024**3
    print(f"\n{'':<20}{'measured':>14}{'target':>14}{'ratio':>8}")
    print(f"{'wall time (median)':<20}{seconds:>12.2f} s{TARGET_SECONDS * scale:>12.1f} s"
          f"{result['time_ratio_to_target']:>8.2f}  {'ok' if ok_time else 'MISSED'}")
    print(f"{'peak memory (max)':<20}{peak / gib:>10.2f} GiB{TARGET_PEAK_BYTES / gib:>10.1f} GiB"
          f"{result['memory_ratio_to_target']:>8.2f}  {'ok' if ok_mem else 'MISSED'}")
    print(f"{'clicks per second':<20}{result['clicks_per_second']:>14,.0f}")
    if scale != 1:
        print(f"(time target scaled to {args.clicks:,} clicks from {TARGET_SECONDS:g} s for 10,000,000)")
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(json.dumps(result, indent=2) + "\n", encoding="utf-8")
    print(f"\nwrote {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
