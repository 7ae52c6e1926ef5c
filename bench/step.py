"""Latency of one exported GRU step against a NumPy floor of the same size, side by side.

    python -m bench.step [--out reports/bench/step.json]

The step graph comes from a random-weight artifact (speed depends on the sizes only): 40,000 items,
hidden size 100, one layer, top 20, one thread. The floor is the part no implementation can skip,
done in NumPy on one BLAS thread: scores = f @ O^T + b, then argpartition for the top 20 and a sort
of those 20. Both are timed in one loop, call after call alternately, so load from anything else on
the machine hits both alike, in two ways:

- tight: call after call (in blocks of 50, step and floor taking turns), the 16 MB output matrix
  stays in the cache as far as it fits;
- cold: a 64 MB buffer is written between calls (untimed), evicting the caches as other requests
  of a busy service would; the output matrix then streams from memory, the cost that matters.

Target: the step's median within 1.5x of the floor's at batch 1. Batch 32 is shown for reference.
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import tempfile
import time
from pathlib import Path

from bench.reporting import write_report

import numpy as np
from threadpoolctl import threadpool_limits

from service.artifacts.format import STEP_GRAPH
from bench.matvec_floor import MatVecFloor
from offline.export.artifact_writer import write_random_artifact
from service.runtime.onnx_step import OnnxStep

TARGET_RATIO = 1.5
EVICT_BYTES = 64 << 20
TIGHT_BLOCK = 50


def _measure(step: OnnxStep, floor: MatVecFloor, batch: int, top_n: int, calls: int, evict: np.ndarray | None, seed: int) -> dict:
    rng = np.random.default_rng(seed)
    items = rng.integers(0, step.n_items, size=(calls, batch)).astype(np.int64)  # [calls, B]
    hidden = step.zero_hidden(batch)  # [L, B, H]
    step_ns = np.empty(calls, dtype=np.int64)
    floor_ns = np.empty(calls, dtype=np.int64)
    clock = time.perf_counter_ns
    # Tight: blocks of calls, step and floor in turn, so that within a block each keeps its own
    # matrix in the cache (two 16 MB matrices called alternately would evict each other).
    # Cold: one call of each in turn, the caches flushed before every call.
    block = 1 if evict is not None else TIGHT_BLOCK
    for start in range(0, calls, block):
        for i in range(start, min(start + block, calls)):
            if evict is not None:
                evict += 1  # reads and writes 64 MB
            t0 = clock()
            hidden, _, _ = step.run(items[i], hidden, top_n)
            step_ns[i] = clock() - t0
        for i in range(start, min(start + block, calls)):
            if evict is not None:
                evict += 1
            t0 = clock()
            floor()
            floor_ns[i] = clock() - t0

    def summary(ns: np.ndarray) -> dict:
        return {"median_us": float(np.median(ns)) / 1e3, "p99_us": float(np.percentile(ns, 99)) / 1e3}

    s, f = summary(step_ns), summary(floor_ns)
    return {
        "batch": batch,
        "mode": "cold" if evict is not None else "tight",
        "calls": calls,
        "step": s,
        "floor": f,
        "ratio_median": s["median_us"] / f["median_us"],
        "ratio_p99": s["p99_us"] / f["p99_us"],
    }


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="python -m bench.step", description=__doc__.split("\n")[0])
    p.add_argument("--out", type=Path, default=Path("reports/bench/step.json"), help="write the results as JSON here")
    p.add_argument("--items", type=int, default=40_000, help="catalogue size (default 40000)")
    p.add_argument("--hidden-size", type=int, default=100, help="GRU state size (default 100)")
    p.add_argument("--top", type=int, default=20, help="items ranked per call (default 20)")
    p.add_argument("--calls", type=int, default=2000, help="timed calls, tight loop at batch 1 (default 2000)")
    p.add_argument("--cold-calls", type=int, default=300, help="timed calls with cache eviction (default 300)")
    p.add_argument("--seed", type=int, default=0)
    args = p.parse_args(argv)

    results = []
    with tempfile.TemporaryDirectory() as tmp, threadpool_limits(limits=1):
        path = write_random_artifact(Path(tmp), "bench", "v1", n_items=args.items, hidden_size=args.hidden_size, seed=args.seed)
        step = OnnxStep(path / STEP_GRAPH, threads=1)
        evict = np.zeros(EVICT_BYTES // 4, dtype=np.float32)
        # Batch 32 costs about ten times as much per call: fewer calls keep the run short.
        for batch, tight_calls, cold_calls in ((1, args.calls, args.cold_calls), (32, args.calls // 10, args.cold_calls // 3)):
            floor = MatVecFloor(args.items, args.hidden_size, batch, args.top, args.seed)
            _measure(step, floor, batch, args.top, max(20, tight_calls // 10), None, args.seed)  # warm-up, not reported
            results.append(_measure(step, floor, batch, args.top, max(20, tight_calls), None, args.seed + 1))
            results.append(_measure(step, floor, batch, args.top, max(20, cold_calls), evict, args.seed + 2))

    print(f"GRU step on ONNX Runtime vs NumPy floor: {args.items} items, hidden {args.hidden_size}, top {args.top}, 1 thread")
    print(f"{'batch':>5} {'mode':>5} {'calls':>6} | {'step med':>9} {'p99':>9} | {'floor med':>9} {'p99':>9} | {'ratio med':>9} {'p99':>6}")
    for r in results:
        print(
            f"{r['batch']:>5} {r['mode']:>5} {r['calls']:>6} | {r['step']['median_us']:>7.0f}us {r['step']['p99_us']:>7.0f}us | "
            f"{r['floor']['median_us']:>7.0f}us {r['floor']['p99_us']:>7.0f}us | {r['ratio_median']:>8.2f}x {r['ratio_p99']:>5.2f}x"
        )
    batch1 = [r for r in results if r["batch"] == 1]
    worst = max(r["ratio_median"] for r in batch1)
    met = worst <= TARGET_RATIO
    print(f"target: batch-1 median within {TARGET_RATIO}x of the floor: worst {worst:.2f}x -> {'met' if met else 'NOT met'}")

    report = {
        "benchmark": "gru-step",
        "items": args.items,
        "hidden_size": args.hidden_size,
        "top_n": args.top,
        "threads": 1,
        "target_ratio": TARGET_RATIO,
        "target_met": met,
        "results": results,
        "machine": {"cpus": os.cpu_count(), "platform": platform.platform(), "python": sys.version.split()[0]},
    }
    write_report(args.out, report)
    print(f"wrote {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
