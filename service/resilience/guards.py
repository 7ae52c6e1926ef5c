"""The service's guards, built once from the settings: the breakers and latency estimates that keep
an answer inside its page budget when the model or the session store is slow or failing.

- `model`: one breaker for the GRU (a step that raises or runs past the request's deadline is a
  failure), with `model_latency`, the running p95 of one step, so a request whose remaining budget
  cannot hold the steps it needs answers from the neighbour table without starting them.
- store breakers: one per part of the session store that fails on its own, named "store" (a
  single Redis) or "store@host:port" (a Redis Cluster master), so one dead master shuts out only
  the sessions it holds; with `store_latency`, the running p95 of one store call, which a click
  keeps in reserve for writing its state.

With `enabled` false (CAIRN_GUARDS=false) nothing is checked or timed: the service runs the bare
path, which the benchmark compares against.
"""

from __future__ import annotations

import time
from collections.abc import Callable

from service.config import Settings
from service.resilience.breaker import BreakerState, CircuitBreaker, OnChange
from service.resilience.latency import LatencyWindow

STORE = "store"
MODEL = "model"


class Guards:
    def __init__(self, settings: Settings, on_change: OnChange | None = None, clock: Callable[[], float] = time.monotonic) -> None:
        self.enabled = settings.guards
        self._settings = settings
        self._on_change = on_change
        self._clock = clock
        s = settings
        self.model = CircuitBreaker(
            MODEL,
            s.model_breaker_window_s,
            s.model_breaker_min_calls,
            s.model_breaker_failure_ratio,
            s.model_breaker_cool_down_s,
            s.model_breaker_trial_calls,
            clock,
            on_change,
        )
        self.model_latency = LatencyWindow(s.latency_window, s.latency_quantile, s.latency_max_age_s)
        self.store_latency = LatencyWindow(s.latency_window, s.latency_quantile, s.latency_max_age_s)
        self._store: dict[str, CircuitBreaker] = {"": self._store_breaker(STORE)}

    def store_breaker(self, shard: str) -> CircuitBreaker:
        """The breaker of one part of the store ("" for a single Redis, a cluster master's host:port)."""
        breaker = self._store.get(shard)
        if breaker is None:
            breaker = self._store[shard] = self._store_breaker(f"{STORE}@{shard}")
        return breaker

    def breakers(self) -> list[CircuitBreaker]:
        return [self.model, *self._store.values()]

    def store_breakers(self) -> list[CircuitBreaker]:
        return list(self._store.values())

    def degraded(self) -> list[str]:
        """The parts shut out now: "model" and/or "store" (an open breaker; half-open is on trial)."""
        parts = []
        if self.model.state is BreakerState.OPEN:
            parts.append(MODEL)
        if any(b.state is BreakerState.OPEN for b in self._store.values()):
            parts.append(STORE)
        return parts

    def model_replaced(self, tag: str) -> None:
        """A new artifact serves: its record starts afresh."""
        self.model.reset(f"now serving {tag}")
        self.model_latency.clear()

    def _store_breaker(self, name: str) -> CircuitBreaker:
        s = self._settings
        return CircuitBreaker(
            name,
            s.store_breaker_window_s,
            s.store_breaker_min_calls,
            s.store_breaker_failure_ratio,
            s.store_breaker_cool_down_s,
            s.store_breaker_trial_calls,
            self._clock,
            self._on_change,
        )
