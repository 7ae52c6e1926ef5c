"""A running high quantile of recent call durations, cheap enough to keep on every request.

The last `size` durations sit in a ring with the time each was taken. The quantile is the
nearest-rank one (the smallest value with at least q of the samples at or below it; Hyndman and
Fan's definition 1, NumPy's method="inverted_cdf") over the samples younger than `max_age_s`. It is
recomputed after every `refresh_every` new samples or `refresh_s` seconds, not on every read: a
sort of a few hundred floats costs tens of microseconds, a cached read a few hundred nanoseconds.
A sample above the cached estimate makes the next read recompute at once, so a slowdown shows
without delay (a p95 is exceeded by one sample in twenty, so this costs little), while a recovery
shows within a refresh.

Old samples age out, so an estimate taken while a model was slow does not keep the model shut out
after it recovered and nothing measures it any more. An empty window estimates 0: nothing
known, nothing refused.
"""

from __future__ import annotations

import math


class LatencyWindow:
    def __init__(self, size: int = 256, quantile: float = 0.95, max_age_s: float = 30.0, refresh_every: int = 16, refresh_s: float = 0.5) -> None:
        if size < 1 or not 0 < quantile <= 1 or max_age_s <= 0 or refresh_every < 1 or refresh_s <= 0:
            raise ValueError(f"size >= 1, 0 < quantile <= 1, max_age_s > 0 are needed, got {size}, {quantile}, {max_age_s}")
        self.size, self.quantile, self.max_age_s = size, quantile, max_age_s
        self.refresh_every, self.refresh_s = refresh_every, refresh_s
        self._values = [0.0] * size
        self._times = [-math.inf] * size
        self._next = 0
        self._fresh = 0  # samples since the estimate was computed
        self._estimate = 0.0
        self._computed_at = -math.inf
        self.last_observed_at = -math.inf  # when the newest sample was taken

    def observe(self, seconds: float, now: float) -> None:
        i = self._next
        self._values[i] = seconds
        self._times[i] = now
        self._next = (i + 1) % self.size
        self.last_observed_at = now
        self._fresh += 1
        if seconds > self._estimate:
            self._fresh = self.refresh_every  # slower than estimated: recompute at the next read

    def estimate(self, now: float) -> float:
        """The quantile of the recent samples, in seconds; 0.0 when there are none."""
        if self._fresh >= self.refresh_every or now - self._computed_at >= self.refresh_s:
            self._estimate = self.compute(now)
            self._computed_at = now
            self._fresh = 0
        return self._estimate

    def compute(self, now: float) -> float:
        """The quantile now, uncached."""
        oldest = now - self.max_age_s
        recent = sorted(v for v, t in zip(self._values, self._times) if t >= oldest)
        if not recent:
            return 0.0
        rank = math.ceil(self.quantile * len(recent))  # nearest rank, 1-based
        return recent[max(rank, 1) - 1]

    def clear(self) -> None:
        for i in range(self.size):
            self._times[i] = -math.inf
        self._fresh = 0
        self._estimate = 0.0
        self._computed_at = -math.inf
