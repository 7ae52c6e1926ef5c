"""The service's guards, built once from the settings: the breakers and latency estimates that keep
an answer inside its page budget when the model or the session store is slow or failing.

- model guards: a breaker for the model (a step that raises or runs past the request's deadline is
  a failure), with the running p95 of one step, so a request whose remaining budget cannot hold
  the steps it needs answers from the neighbour table without starting them. One, named "model";
  in an experiment one per arm, named "model@<arm>": an arm whose model fails is shut out alone,
  and the other arm's visitors keep what their arm serves.
- store breakers: one per part of the session store that fails on its own, named "store" (a
  single Redis) or "store@host:port" (a Redis Cluster master), so one dead master shuts out only
  the sessions it holds; with `store_latency`, the running p95 of one store call, which a click
  keeps in reserve for writing its state.

With `enabled` false (CAIRN_GUARDS=false) nothing is checked or timed: the service runs the bare
path, which the benchmark compares against.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass

from service.config import Settings
from service.resilience.breaker import BreakerState, CircuitBreaker, OnChange
from service.resilience.latency import LatencyWindow

STORE = "store"
MODEL = "model"


@dataclass(frozen=True)
class ModelGuard:
    """One model's breaker and the running estimate of its step time."""

    breaker: CircuitBreaker
    latency: LatencyWindow


class Guards:
    def __init__(
        self, settings: Settings, on_change: OnChange | None = None, clock: Callable[[], float] = time.monotonic, arms: Sequence[str] = ()
    ) -> None:
        self.enabled = settings.guards
        self._settings = settings
        self._on_change = on_change
        self._clock = clock
        s = settings
        names = {arm: f"{MODEL}@{arm}" for arm in arms} if arms else {None: MODEL}
        self._models: dict[str | None, ModelGuard] = {key: self._model_guard(name) for key, name in names.items()}
        first = next(iter(self._models.values()))
        self.model, self.model_latency = first.breaker, first.latency  # the only model's (the first arm's in an experiment)
        self.store_latency = LatencyWindow(s.latency_window, s.latency_quantile, s.latency_max_age_s)
        self._store: dict[str, CircuitBreaker] = {"": self._store_breaker(STORE)}

    def model_guard(self, arm: str | None = None) -> ModelGuard:
        """The guard of the model serving `arm` (None: the only model); KeyError for an arm not declared."""
        return self._models[arm]

    def model_guards(self) -> dict[str | None, ModelGuard]:
        return dict(self._models)

    def store_breaker(self, shard: str) -> CircuitBreaker:
        """The breaker of one part of the store ("" for a single Redis, a cluster master's host:port)."""
        breaker = self._store.get(shard)
        if breaker is None:
            breaker = self._store[shard] = self._store_breaker(f"{STORE}@{shard}")
        return breaker

    def breakers(self) -> list[CircuitBreaker]:
        return [*(g.breaker for g in self._models.values()), *self._store.values()]

    def store_breakers(self) -> list[CircuitBreaker]:
        return list(self._store.values())

    def degraded(self) -> list[str]:
        """The parts shut out now: "model" and/or "store" (an open breaker; half-open is on trial)."""
        parts = []
        if any(g.breaker.state is BreakerState.OPEN for g in self._models.values()):
            parts.append(MODEL)
        if any(b.state is BreakerState.OPEN for b in self._store.values()):
            parts.append(STORE)
        return parts

    def model_replaced(self, tag: str, arm: str | None = None) -> None:
        """A new artifact serves (`arm`'s, in an experiment): its record starts afresh."""
        guard = self._models[arm]
        guard.breaker.reset(f"now serving {tag}")
        guard.latency.clear()

    def _model_guard(self, name: str) -> ModelGuard:
        s = self._settings
        breaker = CircuitBreaker(
            name,
            s.model_breaker_window_s,
            s.model_breaker_min_calls,
            s.model_breaker_failure_ratio,
            s.model_breaker_cool_down_s,
            s.model_breaker_trial_calls,
            self._clock,
            self._on_change,
        )
        return ModelGuard(breaker, LatencyWindow(s.latency_window, s.latency_quantile, s.latency_max_age_s))

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
