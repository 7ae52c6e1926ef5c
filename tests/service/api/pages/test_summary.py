"""The operator summary's arithmetic: quantiles from histogram buckets as Prometheus computes them,
and a rate over a window that slides."""

from __future__ import annotations

import numpy as np
import pytest

from service.api.metrics import LATENCY_BUCKETS, ServiceMetrics
from service.api.pages.summary import OperatorSummary, histogram_quantile


def test_histogram_quantile_follows_prometheus() -> None:
    # Prometheus documentation, "Query functions", histogram_quantile(): linear interpolation within
    # the bucket the rank falls in, the lowest bucket starting at 0, and a rank in the +Inf bucket
    # answered with the highest finite bound. Worked by hand: 10 in (0, 0.1], 30 in (0.1, 0.2].
    bounds = (0.1, 0.2)
    assert histogram_quantile(0.5, bounds, [10, 30, 0]) == pytest.approx(0.1 + 0.1 * (20 - 10) / 30)
    assert histogram_quantile(0.05, bounds, [10, 30, 0]) == pytest.approx(0.1 * 2 / 10)
    assert histogram_quantile(1.0, bounds, [10, 30, 0]) == pytest.approx(0.2)
    assert histogram_quantile(0.99, bounds, [10, 30, 60]) == 0.2  # in +Inf: the highest finite bound
    assert histogram_quantile(0.5, bounds, [0, 0, 0]) is None
    assert histogram_quantile(0.5, bounds, [0, 8, 0]) == pytest.approx(0.15)  # empty buckets skipped


def test_histogram_quantile_agrees_with_numpy_on_evenly_spread_values() -> None:
    # Values spread evenly inside each bucket are what the interpolation assumes, so it must then
    # match numpy's quantile of the values themselves (up to the spacing of the values).
    bounds = LATENCY_BUCKETS
    rng = np.random.default_rng(0)
    per_bucket = rng.integers(0, 400, size=len(bounds))
    lows = (0.0, *bounds[:-1])
    values = np.concatenate([np.linspace(lo, hi, n + 1)[1:] for lo, hi, n in zip(lows, bounds, per_bucket)])
    for q in (0.5, 0.9, 0.99):
        got = histogram_quantile(q, bounds, [*map(float, per_bucket), 0.0])
        assert got == pytest.approx(np.quantile(values, q, method="inverted_cdf"), rel=0.02)


class _Clock:
    def __init__(self) -> None:
        self.now = 1000.0

    def __call__(self) -> float:
        return self.now


def test_summary_window_slides() -> None:
    metrics, clock = ServiceMetrics(), _Clock()
    summary = OperatorSummary(metrics, window_s=60.0, clock=clock)

    def answers(n: int, seconds: float, served_by: str = "gru") -> None:
        for _ in range(n):
            metrics.answer_duration.observe((served_by,), seconds)

    answers(30, 0.004)
    clock.now += 10
    first = summary.summary()
    assert first["answers_in_window"] == 30 and first["answers_per_s"] == 3.0 and first["window_s"] == 10.0
    assert 2.5 < first["p50_ms"] <= 5.0 and first["p99_ms"] <= 5.0  # all in the (2.5 ms, 5 ms] bucket
    clock.now += 60  # the first 30 answers are now older than the window
    answers(20, 0.2, "neighbours")
    metrics.fallbacks.inc(("budget",), 20)
    second = summary.summary()
    assert second["answers_in_window"] == 20 and second["window_s"] == 60.0
    assert 100 < second["p50_ms"] <= 250 and second["answers_per_s"] == pytest.approx(20 / 60, abs=0.01)
    assert second["answers_by_served_by"] == {"gru": 30, "neighbours": 20}  # totals since start
    assert second["fallbacks_by_reason"] == {"budget": 20}
    clock.now += 0.5  # within a second of the last snapshot: none added, the window stays
    assert summary.summary()["answers_in_window"] == 20
