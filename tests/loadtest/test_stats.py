"""Per-step stats: nearest-rank percentiles, merging workers, the summary."""

from __future__ import annotations

import math
from collections import Counter

import numpy as np
import pytest

from loadtest.stats import StepStats, merge_steps, nearest_rank, summarize


def test_nearest_rank_matches_the_worked_example() -> None:
    # Wikipedia, "Percentile", nearest-rank method, worked example (from memory): for the ordered
    # list 15, 20, 35, 40, 50 the 5th, 30th, 40th, 50th and 100th percentiles are 15, 20, 20, 35, 50.
    values = np.array([15, 20, 35, 40, 50], dtype=np.float64)
    assert [nearest_rank(values, p) for p in (5, 30, 40, 50, 100)] == [15, 20, 20, 35, 50]
    assert math.isnan(nearest_rank(np.array([]), 99))


def test_nearest_rank_p99_is_a_value_99_percent_stay_at_or_under() -> None:
    values = np.sort(np.random.default_rng(0).exponential(3.0, size=1001))
    p99 = nearest_rank(values, 99)
    assert p99 in values
    assert np.mean(values <= p99) >= 0.99  # the definition of the budget check
    assert np.mean(values < p99) < 0.99  # and it is the smallest such value


def test_json_round_trip_keeps_everything() -> None:
    s = StepStats(
        latencies_ms=[1.5, 2.25], errors=Counter({"http 503": 1}), served_by=Counter({"gru": 1}),
        fallback=Counter({"none": 1}), hits=1, hit_events=2, visits_started=1, visits_completed=1,
        window_start=100.0, cpu_s=0.5, wall_s=2.0,
    )  # fmt: skip
    assert StepStats.from_json(s.to_json()) == s
    empty = StepStats()
    assert StepStats.from_json(empty.to_json()) == empty


def test_merge_adds_counts_and_keeps_the_busiest_worker_cpu() -> None:
    a = StepStats(latencies_ms=[1.0], served_by=Counter({"gru": 1}), hits=1, hit_events=1, window_start=10.0, cpu_s=0.2, wall_s=1.0)
    b = StepStats(latencies_ms=[3.0, 2.0], served_by=Counter({"gru": 1, "neighbours": 1}), hit_events=2, window_start=10.1, cpu_s=0.9, wall_s=1.0)
    m = merge_steps([a, b])
    assert sorted(m.latencies_ms) == [1.0, 2.0, 3.0]
    assert m.served_by == Counter({"gru": 2, "neighbours": 1})
    assert (m.hits, m.hit_events, m.window_start) == (1, 3, 10.0)
    assert (m.cpu_s, m.wall_s) == (0.9, 1.0)


def test_summary_rates_shares_and_window() -> None:
    s = StepStats(
        latencies_ms=[float(x) for x in range(1, 101)],  # 1..100 ms
        errors=Counter({"timeout": 4}),
        served_by=Counter({"gru": 90, "neighbours": 6}),
        fallback=Counter({"none": 90, "deadline": 6}),
        hits=30,
        hit_events=80,
        window_start=1000.0,
        cpu_s=0.5,
        wall_s=2.0,
    )
    full = summarize(0, s, 50.0, planned_window_s=2.0, run_end=1010.0)
    assert (full.window_s, full.requests, full.rps) == (2.0, 100, 50.0)
    assert (full.p50_ms, full.p95_ms, full.p99_ms, full.max_ms) == (50.0, 95.0, 99.0, 100.0)
    assert full.mean_ms == pytest.approx(50.5)
    assert full.error_rate == pytest.approx(0.04)
    assert full.served_by == pytest.approx({"gru": 90 / 96, "neighbours": 6 / 96})
    assert list(full.fallback_reason) == ["none", "deadline"]  # most frequent first
    assert full.hit_rate == pytest.approx(30 / 80)
    assert full.generator_cpu_percent == pytest.approx(25.0)
    # A run that ended half way through the step: the rate is over the time it ran.
    early = summarize(0, s, 50.0, planned_window_s=2.0, run_end=1001.0)
    assert (early.window_s, early.rps) == (1.0, 100.0)
    nothing = summarize(3, StepStats(), None, planned_window_s=2.0, run_end=1001.0)
    assert (nothing.requests, nothing.rps, nothing.hit_rate) == (0, 0.0, None)
    assert nothing.to_json()["latency_ms"]["p99"] is None
