"""What the simulated visitors measured, per step of the load, and its summary.

Every Locust worker process keeps one `StepStats` per step and writes them to a JSON file when it
stops; the CLI merges the files of all workers. Latencies are kept whole (not binned) so the
percentiles of the merged run are exact.
"""

from __future__ import annotations

import math
from collections import Counter
from dataclasses import dataclass, field
from typing import Any

import numpy as np

NO_FALLBACK = "none"  # the key under which answers without a fallback_reason are counted


@dataclass
class StepStats:
    latencies_ms: list[float] = field(default_factory=list)  # one per answered or failed request
    errors: Counter = field(default_factory=Counter)  # kind ("http 503", "timeout", ...) -> count
    served_by: Counter = field(default_factory=Counter)  # over good answers
    fallback: Counter = field(default_factory=Counter)  # fallback_reason over good answers
    hits: int = 0  # next click among the items just shown
    hit_events: int = 0  # answers (good or not) to a click that has a next click
    visits_started: int = 0
    visits_completed: int = 0
    window_start: float = math.inf  # epoch s, start of the step on this worker's clock
    cpu_s: float = 0.0  # load-generator process CPU time during the step
    wall_s: float = 0.0  # wall time over which cpu_s was sampled

    @property
    def requests(self) -> int:
        return len(self.latencies_ms)

    def to_json(self) -> dict[str, Any]:
        return {
            "latencies_ms": [round(x, 4) for x in self.latencies_ms],
            "errors": dict(self.errors),
            "served_by": dict(self.served_by),
            "fallback": dict(self.fallback),
            "hits": self.hits,
            "hit_events": self.hit_events,
            "visits_started": self.visits_started,
            "visits_completed": self.visits_completed,
            "window_start": None if math.isinf(self.window_start) else self.window_start,
            "cpu_s": self.cpu_s,
            "wall_s": self.wall_s,
        }

    @staticmethod
    def from_json(d: dict[str, Any]) -> "StepStats":
        ws = d.get("window_start")
        return StepStats(
            latencies_ms=[float(x) for x in d["latencies_ms"]],
            errors=Counter(d["errors"]),
            served_by=Counter(d["served_by"]),
            fallback=Counter(d["fallback"]),
            hits=int(d["hits"]),
            hit_events=int(d["hit_events"]),
            visits_started=int(d["visits_started"]),
            visits_completed=int(d["visits_completed"]),
            window_start=math.inf if ws is None else float(ws),
            cpu_s=float(d["cpu_s"]),
            wall_s=float(d["wall_s"]),
        )


def merge_steps(parts: list[StepStats]) -> StepStats:
    """One step's stats over all workers. CPU is not summed: each worker is its own process, and
    what matters is whether any one of them ran out of CPU, so the merged step keeps the busiest."""
    out = StepStats()
    busiest = 0.0
    for p in parts:
        out.latencies_ms.extend(p.latencies_ms)
        out.errors.update(p.errors)
        out.served_by.update(p.served_by)
        out.fallback.update(p.fallback)
        out.hits += p.hits
        out.hit_events += p.hit_events
        out.visits_started += p.visits_started
        out.visits_completed += p.visits_completed
        out.window_start = min(out.window_start, p.window_start)
        share = p.cpu_s / p.wall_s if p.wall_s > 0 else 0.0
        if share >= busiest:
            busiest, out.cpu_s, out.wall_s = share, p.cpu_s, p.wall_s
    return out


def nearest_rank(sorted_values: np.ndarray, p: float) -> float:
    """The p-th percentile by the nearest-rank method: the smallest value with at least p% of the
    values at or below it, ordinal rank ceil(p/100 * N) (Wikipedia, "Percentile", nearest-rank
    method). A latency budget "p99 <= B" then means: at least 99% of requests took B or less."""
    n = len(sorted_values)
    if n == 0:
        return math.nan
    rank = max(1, math.ceil(p / 100.0 * n))
    return float(sorted_values[rank - 1])


@dataclass(frozen=True)
class StepSummary:
    index: int
    target_rps: float | None
    window_s: float
    requests: int
    rps: float
    p50_ms: float
    p95_ms: float
    p99_ms: float
    max_ms: float
    mean_ms: float
    error_rate: float
    errors: dict[str, int]
    served_by: dict[str, float]  # share of good answers
    fallback_reason: dict[str, float]  # share of good answers; "none" = no fallback
    hit_rate: float | None
    hits: int
    hit_events: int
    visits_started: int
    visits_completed: int
    generator_cpu_percent: float  # the busiest load-generator process during the step

    def to_json(self) -> dict[str, Any]:
        def num(x: float | None) -> float | None:
            return None if x is None or (isinstance(x, float) and math.isnan(x)) else round(float(x), 4)

        return {
            "index": self.index,
            "target_rps": num(self.target_rps),
            "window_s": num(self.window_s),
            "requests": self.requests,
            "rps": num(self.rps),
            "latency_ms": {
                "p50": num(self.p50_ms),
                "p95": num(self.p95_ms),
                "p99": num(self.p99_ms),
                "max": num(self.max_ms),
                "mean": num(self.mean_ms),
            },
            "error_rate": num(self.error_rate),
            "errors": dict(self.errors),
            "served_by": {k: num(v) for k, v in self.served_by.items()},
            "fallback_reason": {k: num(v) for k, v in self.fallback_reason.items()},
            "hit_rate": num(self.hit_rate),
            "hits": self.hits,
            "hit_events": self.hit_events,
            "visits_started": self.visits_started,
            "visits_completed": self.visits_completed,
            "generator_cpu_percent": num(self.generator_cpu_percent),
        }


def summarize(index: int, stats: StepStats, target_rps: float | None, planned_window_s: float, run_end: float) -> StepSummary:
    """Summary of one merged step. The window is the planned step length, or shorter when the
    run ended early (every visit replayed once): from the step's start to `run_end` (epoch s)."""
    lat = np.sort(np.asarray(stats.latencies_ms, dtype=np.float64))  # [requests]
    n = len(lat)
    n_err = sum(stats.errors.values())
    good = n - n_err
    if math.isinf(stats.window_start):
        window = 0.0
    else:
        window = min(planned_window_s, max(run_end - stats.window_start, 0.0))
    return StepSummary(
        index=index,
        target_rps=target_rps,
        window_s=window,
        requests=n,
        rps=n / window if window > 0 else 0.0,
        p50_ms=nearest_rank(lat, 50),
        p95_ms=nearest_rank(lat, 95),
        p99_ms=nearest_rank(lat, 99),
        max_ms=float(lat[-1]) if n else math.nan,
        mean_ms=float(lat.mean()) if n else math.nan,
        error_rate=n_err / n if n else 0.0,
        errors=dict(sorted(stats.errors.items())),
        served_by=_shares(stats.served_by, good),
        fallback_reason=_shares(stats.fallback, good),
        hit_rate=stats.hits / stats.hit_events if stats.hit_events else None,
        hits=stats.hits,
        hit_events=stats.hit_events,
        visits_started=stats.visits_started,
        visits_completed=stats.visits_completed,
        generator_cpu_percent=100.0 * stats.cpu_s / stats.wall_s if stats.wall_s > 0 else 0.0,
    )


def _shares(counts: Counter, total: int) -> dict[str, float]:
    if total <= 0:
        return {}
    return {k: v / total for k, v in sorted(counts.items(), key=lambda kv: (-kv[1], kv[0]))}
