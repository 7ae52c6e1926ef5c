"""A circuit breaker: closed, open, half-open (the pattern as Michael Nygard's "Release It!" draws it).

    closed     calls pass; each outcome lands in a rolling window of `window_s` seconds (ten
               buckets, so old outcomes leave it a tenth at a time). When the window holds at least
               `min_calls` outcomes and the share of failures (errors and timeouts) reaches
               `failure_ratio`, the breaker opens.
    open       calls are refused at once, for `cool_down_s`.
    half-open  up to `trial_calls` calls pass as trials. When that many have succeeded the breaker
               closes with an empty window; the first trial that fails opens it again.

`allow()` hands out a ticket (the breaker's generation) or None; the outcome is reported with that
ticket, so a call that started before the breaker changed state cannot sway the new state. A call
abandoned without an outcome (its request was cancelled) gives its ticket back with `release`.
Everything runs on one event loop: no locks. State changes are logged and reported to `on_change`.
"""

from __future__ import annotations

import enum
import logging
import time
from collections.abc import Callable

log = logging.getLogger("cairn.service")

_BUCKETS = 10


class BreakerState(enum.IntEnum):
    """Values as the metrics export them: 0 closed, 1 half-open, 2 open."""

    CLOSED = 0
    HALF_OPEN = 1
    OPEN = 2

    @property
    def label(self) -> str:
        return self.name.lower().replace("_", "-")


OnChange = Callable[[str, BreakerState, BreakerState], None]


class CircuitBreaker:
    def __init__(
        self,
        name: str,
        window_s: float,
        min_calls: int,
        failure_ratio: float,
        cool_down_s: float,
        trial_calls: int,
        clock: Callable[[], float] = time.monotonic,
        on_change: OnChange | None = None,
    ) -> None:
        if not (window_s > 0 and min_calls >= 1 and 0 < failure_ratio <= 1 and cool_down_s >= 0 and trial_calls >= 1):
            raise ValueError(
                f"breaker {name}: window_s > 0, min_calls >= 1, 0 < failure_ratio <= 1, cool_down_s >= 0 and "
                f"trial_calls >= 1 are needed, got {window_s}, {min_calls}, {failure_ratio}, {cool_down_s}, {trial_calls}"
            )
        self.name = name
        self.window_s, self.min_calls, self.failure_ratio = window_s, min_calls, failure_ratio
        self.cool_down_s, self.trial_calls = cool_down_s, trial_calls
        self._clock = clock
        self._on_change = on_change
        self._bucket_s = window_s / _BUCKETS
        self._bucket_ids = [-1] * _BUCKETS  # which time slot each bucket counts now
        self._calls = [0] * _BUCKETS
        self._failures = [0] * _BUCKETS
        self._state = BreakerState.CLOSED
        self._generation = 0
        self._opened_at = 0.0
        self._trials_out = 0  # half-open: trial calls running
        self._trials_ok = 0  # half-open: trial calls that succeeded
        self.transitions: dict[tuple[BreakerState, BreakerState], int] = {}

    @property
    def state(self) -> BreakerState:
        """The state now; an open breaker whose cool-down is over reads (and becomes) half-open."""
        if self._state is BreakerState.OPEN and self._clock() - self._opened_at >= self.cool_down_s:
            self._move(BreakerState.HALF_OPEN, f"cool-down of {self.cool_down_s:g} s over")
        return self._state

    def allow(self) -> int | None:
        """A ticket for one call, or None: the call must not be made."""
        state = self._state
        if state is BreakerState.CLOSED:
            return self._generation
        if state is BreakerState.OPEN:
            if self._clock() - self._opened_at < self.cool_down_s:
                return None
            self._move(BreakerState.HALF_OPEN, f"cool-down of {self.cool_down_s:g} s over")
        if self._trials_out + self._trials_ok >= self.trial_calls:
            return None
        self._trials_out += 1
        return self._generation

    def record(self, ticket: int | None, ok: bool) -> None:
        """The outcome of the call `ticket` was handed out for."""
        if ticket != self._generation:
            return  # started under an earlier state
        if self._state is BreakerState.CLOSED:
            self._count(ok)
        elif self._state is BreakerState.HALF_OPEN:
            self._trials_out -= 1
            if not ok:
                self._move(BreakerState.OPEN, "a trial call failed")
            else:
                self._trials_ok += 1
                if self._trials_ok >= self.trial_calls:
                    self._move(BreakerState.CLOSED, f"{self._trials_ok} trial calls succeeded")

    def release(self, ticket: int | None) -> None:
        """Give back the ticket of a call that was not made or ended without an outcome."""
        if ticket == self._generation and self._state is BreakerState.HALF_OPEN and self._trials_out > 0:
            self._trials_out -= 1

    def reset(self, why: str) -> None:
        """Closed with an empty window (the guarded part was replaced)."""
        if self._state is not BreakerState.CLOSED:
            self._move(BreakerState.CLOSED, why)
        else:
            self._clear()

    def window(self) -> tuple[int, int]:
        """(calls, failures) in the rolling window now."""
        slot = int(self._clock() / self._bucket_s)
        calls = failures = 0
        for b in range(_BUCKETS):
            if slot - self._bucket_ids[b] < _BUCKETS:
                calls += self._calls[b]
                failures += self._failures[b]
        return calls, failures

    def _count(self, ok: bool) -> None:
        slot = int(self._clock() / self._bucket_s)
        b = slot % _BUCKETS
        if self._bucket_ids[b] != slot:  # the bucket still counts a slot that has left the window
            self._bucket_ids[b] = slot
            self._calls[b] = 0
            self._failures[b] = 0
        self._calls[b] += 1
        if ok:
            return
        self._failures[b] += 1
        calls, failures = self.window()  # only after a failure: successes never open a breaker
        if calls >= self.min_calls and failures >= self.failure_ratio * calls:
            self._move(BreakerState.OPEN, f"{failures} of {calls} calls failed in the last {self.window_s:g} s")

    def _clear(self) -> None:
        for b in range(_BUCKETS):
            self._bucket_ids[b] = -1
            self._calls[b] = self._failures[b] = 0

    def _move(self, new: BreakerState, why: str) -> None:
        old = self._state
        self._state = new
        self._generation += 1
        self._trials_out = self._trials_ok = 0
        if new is BreakerState.OPEN:
            self._opened_at = self._clock()
        elif new is BreakerState.CLOSED:
            self._clear()
        self.transitions[(old, new)] = self.transitions.get((old, new), 0) + 1
        (log.warning if new is BreakerState.OPEN else log.info)("circuit breaker %s: %s -> %s (%s)", self.name, old.label, new.label, why)
        if self._on_change is not None:
            self._on_change(self.name, old, new)
