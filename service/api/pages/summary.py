"""The operator page's numbers: request rate and answer-time quantiles over the last minutes, and
answers by recommender and by fallback reason, all read from this worker's own metrics.

Each call of the summary route keeps one snapshot of the counters (at most one a second, for at
most `WINDOW_S`), and the figures are the difference between now and the oldest snapshot kept: a
rate and quantiles over a sliding window, as Prometheus' rate() and histogram_quantile() compute
them from a scraped histogram. Nothing of this runs on the click path; with several workers a page
sees the worker that answered it, as /metrics does.
"""

from __future__ import annotations

import math
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from service.api.metrics import ServiceMetrics

WINDOW_S = 300.0  # "the last minutes": five, as a dashboard's default range (common practice)
_MIN_GAP_S = 1.0  # one snapshot a second is plenty for a page refreshed every few seconds
_MAX_SNAPSHOTS = int(WINDOW_S / _MIN_GAP_S) + 2


def histogram_quantile(q: float, bounds: tuple[float, ...], counts: list[float]) -> float | None:
    """The q-quantile of observations counted per bucket, as Prometheus' histogram_quantile() does.

    `counts` are per bucket (not cumulative), one per upper bound in `bounds` plus the +Inf bucket.
    Within a bucket the observations are taken as spread evenly (linear interpolation), the first
    bucket starting at 0; a quantile in the +Inf bucket is the highest finite bound. None without
    observations. (Prometheus documentation, "Query functions", histogram_quantile.)
    """
    total = sum(counts)
    if total <= 0:
        return None
    rank = q * total
    cumulative = 0.0
    for i, n in enumerate(counts):
        if cumulative + n >= rank and n > 0:
            if i == len(bounds):  # the +Inf bucket
                return bounds[-1]
            lower = 0.0 if i == 0 else bounds[i - 1]
            return lower + (bounds[i] - lower) * (rank - cumulative) / n
        cumulative += n
    return bounds[-1]


@dataclass(frozen=True)
class _Snapshot:
    at: float  # seconds on the summary's clock
    requests: float  # recommendation answers so far
    buckets: list[float]  # answer-time bucket counts so far, summed over recommenders (+Inf last)


class OperatorSummary:
    """Windowed figures from `metrics`; `summary()` is called by the page's route only."""

    def __init__(self, metrics: ServiceMetrics, window_s: float = WINDOW_S, clock: Callable[[], float] = time.monotonic) -> None:
        self.metrics = metrics
        self.window_s = window_s
        self.clock = clock
        self._snapshots: deque[_Snapshot] = deque(maxlen=_MAX_SNAPSHOTS)
        self._snapshots.append(self._take())  # the start: the first window reaches back to it

    def _take(self) -> _Snapshot:
        hist = self.metrics.answer_duration
        buckets = [0.0] * (len(hist.buckets) + 1)
        for series in hist.snapshot().values():
            for i, n in enumerate(series[:-1]):
                buckets[i] += n
        return _Snapshot(self.clock(), sum(buckets), buckets)

    def summary(self) -> dict[str, Any]:
        now = self._take()
        if now.at - self._snapshots[-1].at >= _MIN_GAP_S:
            self._snapshots.append(now)
        # The oldest snapshot still inside the window, or the newest one before it began.
        while len(self._snapshots) > 1 and self._snapshots[1].at <= now.at - self.window_s:
            self._snapshots.popleft()
        old = self._snapshots[0]
        span = now.at - old.at
        counts = [a - b for a, b in zip(now.buckets, old.buckets)]
        bounds = self.metrics.answer_duration.buckets
        p50, p99 = histogram_quantile(0.5, bounds, counts), histogram_quantile(0.99, bounds, counts)
        answers = {labels[0]: self.metrics.answer_duration.count(labels) for labels in self.metrics.answer_duration.snapshot()}
        fallbacks = {labels[0]: value for labels, value in self.metrics.fallbacks.snapshot().items()}
        return {
            "window_s": round(span, 1),
            "answers_in_window": int(now.requests - old.requests),
            "answers_per_s": round((now.requests - old.requests) / span, 2) if span > 0 else 0.0,
            "p50_ms": _ms(p50),
            "p99_ms": _ms(p99),
            "answers_by_served_by": dict(sorted(answers.items())),
            "fallbacks_by_reason": {k: int(v) for k, v in sorted(fallbacks.items())},
        }


def _ms(seconds: float | None) -> float | None:
    return None if seconds is None or math.isnan(seconds) else round(seconds * 1e3, 2)
