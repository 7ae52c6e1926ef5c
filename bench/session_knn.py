"""What one click costs the served session-KNN, at the demo's catalogue size and at 200,000 items.

The index is built as a random artifact builds it (offline/export/artifact_writer.py: five random
sessions of 1-8 clicks per item, items drawn by a Zipf-like popularity, M = 500 most recent sessions
per item); visits of 1-20 clicks drawn the same way are replayed click by click through
`SessionKnnRecommender.recommend` (k = 100, linear weighting, 20 items, the visit's items left out),
one core, in-process. Beside it, a dense score vector over the whole catalogue plus its top 20
(what a scorer that is not sparse pays per click) shows which cost follows the catalogue.
Prints p50 and p99 per click and the ratio of the large catalogue to the small one.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

from bench.reporting import write_report
from offline.export.artifact_writer import _random_session_index, _random_sessions
from service.runtime.recommenders import PopularityRecommender
from service.runtime.session_knn import SessionKnnRecommender


def _percentiles(ns: list[int]) -> dict:
    ms = np.asarray(ns, dtype=np.float64) / 1e6
    p50, p99 = np.percentile(ms, [50, 99])
    return {"p50_ms": float(p50), "p99_ms": float(p99), "clicks": len(ms)}


def measure(n_items: int, clicks: int, seed: int) -> dict:
    rng = np.random.default_rng(seed)
    popularity = (1e4 / np.arange(1, n_items + 1))[rng.permutation(n_items)].astype(np.float32)
    started = time.perf_counter()
    index = _random_session_index(_random_sessions(n_items, popularity, rng), n_items)
    built_s = time.perf_counter() - started
    pop = PopularityRecommender(popularity)
    knn = SessionKnnRecommender(index, pop, neighbours=100, weighting="linear")
    cdf = np.cumsum(popularity.astype(np.float64))
    cdf /= cdf[-1]
    sparse_ns: list[int] = []
    dense_ns: list[int] = []
    dense = np.empty(n_items, dtype=np.float32)
    while len(sparse_ns) < clicks:
        visit: list[int] = []
        drawn = np.minimum(np.searchsorted(cdf, rng.random(int(rng.integers(1, 21)))), n_items - 1)  # by popularity
        for item in drawn.tolist():
            visit.append(item)
            seen = frozenset(visit[-21:])
            t0 = time.perf_counter_ns()
            knn.recommend(visit[-21:], 20, seen)
            sparse_ns.append(time.perf_counter_ns() - t0)
            t0 = time.perf_counter_ns()
            dense[:] = 0.0  # the dense alternative: a score per catalogue item, then its top 20
            np.argpartition(dense, -20)[-20:]
            dense_ns.append(time.perf_counter_ns() - t0)
    warm = 50
    return {
        "items": n_items,
        "sessions": index.n_sessions,
        "index_built_s": built_s,
        "session_knn": _percentiles(sparse_ns[warm:clicks]),
        "dense_vector_floor": _percentiles(dense_ns[warm:clicks]),
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m bench.session_knn", description=__doc__.splitlines()[0])
    parser.add_argument("--items", default="3000,200000", help="catalogue sizes, comma-separated (default 3000,200000)")
    parser.add_argument("--clicks", type=int, default=3000, help="clicks timed per size (default 3000)")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--out", type=Path, default=Path("reports/bench/session_knn.json"))
    args = parser.parse_args(argv)
    try:
        sizes = [int(s) for s in args.items.split(",") if s.strip()]
        if not sizes or min(sizes) < 2 or args.clicks < 100:
            raise ValueError
    except ValueError:
        print(f"session_knn: --items must be sizes >= 2 and --clicks >= 100, got {args.items!r}, {args.clicks}", file=sys.stderr)
        return 2
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # one core is what the service gives a worker; without the helper, numpy's own setting
        threadpool_limits = None
    runs = []
    for n in sizes:
        if threadpool_limits is not None:
            with threadpool_limits(1):
                runs.append(measure(n, args.clicks, args.seed))
        else:
            runs.append(measure(n, args.clicks, args.seed))
        r = runs[-1]
        print(
            f"{n:>8,} items ({r['sessions']:,} sessions): session-knn p50 {r['session_knn']['p50_ms']:.3f} ms, "
            f"p99 {r['session_knn']['p99_ms']:.3f} ms; dense vector + top 20 p50 {r['dense_vector_floor']['p50_ms']:.3f} ms"
        )
    report: dict = {"runs": runs}
    if len(runs) > 1:
        small, large = runs[0], runs[-1]
        report["ratio_large_to_small"] = {
            "items": large["items"] / small["items"],
            "session_knn_p50": large["session_knn"]["p50_ms"] / small["session_knn"]["p50_ms"],
            "session_knn_p99": large["session_knn"]["p99_ms"] / small["session_knn"]["p99_ms"],
            "dense_vector_p50": large["dense_vector_floor"]["p50_ms"] / small["dense_vector_floor"]["p50_ms"],
        }
        ratio = report["ratio_large_to_small"]
        print(
            f"{ratio['items']:.0f}x the items: session-knn p50 x{ratio['session_knn_p50']:.2f}, p99 x{ratio['session_knn_p99']:.2f}; "
            f"dense vector p50 x{ratio['dense_vector_p50']:.2f}"
        )
    write_report(args.out, report)
    print(f"wrote {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
