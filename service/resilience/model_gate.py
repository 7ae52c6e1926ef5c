"""The model behind its circuit breaker and the request's budget.

`admit` lets the model start only if its breaker allows and the running p95 of one step, times the
steps this request needs (a replay needs one per stored click), plus the store's reserve for the
save, fits in what is left of the budget; else the fallback reason `model_unavailable` or `budget`.

A refused model is never measured, so an estimate lifted by a short stall (a process paused for
150 ms during a burst) would keep it out until those samples aged out (CAIRN_LATENCY_MAX_AGE_S,
30 s). So when no sample has come for CAIRN_LATENCY_PROBE_S and the event loop is idle, one
request the estimate would refuse runs as a probe (still under its deadline); if it fits, the
window starts afresh from its sample. Under sustained overload the loop is busy and no probe runs:
the service keeps shedding to the neighbour table and inside its budget.
`run` runs the admitted work under the model's own deadline: a call that runs past it is abandoned
(`deadline`) and counts against the breaker, as does one that fails (`model_error`).
With the guards off nothing is checked or timed.
"""

from __future__ import annotations

import asyncio
import logging
import time
from collections.abc import Awaitable, Callable
from dataclasses import dataclass
from typing import Any

from service.resilience.guards import Guards
from service.resilience.loop_lag import LoopLag
from service.runtime.recommenders import Ranking
from service.runtime.timing import Timing

log = logging.getLogger("cairn.service")

# uvloop's timers tick in whole milliseconds (libuv keeps loop time in ms), so a timeout can fire up
# to a millisecond late: the model's is set that much early.
TIMER_MARGIN_S = 0.001


PROBE_MAX_LOOP_LAG_S = 0.002  # "idle": no loop backlog over 2 ms in the last second (a saturated loop shows tens)


@dataclass(frozen=True)
class Admission:
    ticket: int | None  # the breaker's ticket (None with the guards off)
    deadline: float  # perf_counter time by which the model must be done
    steps: int
    probe: bool = False  # admitted against the estimate, to measure the model again


class _NoTimeout:
    """Stands in for asyncio.timeout when the guards are off: nothing scheduled, nothing cancelled."""

    async def __aenter__(self) -> None:
        return None

    async def __aexit__(self, *exc: object) -> None:
        return None


_NO_TIMEOUT = _NoTimeout()


class ModelGate:
    """The gate of one model: the only one, or one experiment arm's (`arm`), with that model's guard."""

    def __init__(self, guards: Guards | None, loop_lag: LoopLag | None = None, probe_after_s: float = 1.0, arm: str | None = None) -> None:
        self.guards = guards
        self.guard = guards.model_guard(arm) if guards is not None else None
        self.guarded = guards is not None and guards.enabled
        self.loop_lag = loop_lag
        self.probe_after_s = probe_after_s
        self._probing = False

    def admit(self, steps: int, deadline: float, save_reserve_s: float) -> Admission | str:
        """An Admission when the model may run `steps` steps now, else the fallback reason."""
        if not self.guarded:
            return Admission(None, deadline, steps)
        guard = self.guard
        ticket = guard.breaker.allow()
        if ticket is None:
            return "model_unavailable"
        now = time.perf_counter()
        model_deadline = deadline - TIMER_MARGIN_S - save_reserve_s
        if now + guard.latency.estimate(now) * steps > model_deadline:
            if self._may_probe(now, model_deadline):
                self._probing = True
                return Admission(ticket, model_deadline, steps, probe=True)
            guard.breaker.release(ticket)
            return "budget"
        return Admission(ticket, model_deadline, steps)

    def _may_probe(self, now: float, model_deadline: float) -> bool:
        return (
            self.loop_lag is not None
            and not self._probing
            and model_deadline > now
            and now - self.guard.latency.last_observed_at >= self.probe_after_s
            and self.loop_lag.recent_max_s <= PROBE_MAX_LOOP_LAG_S
        )

    async def run(
        self, call: Callable[[], Awaitable[tuple[Any, Ranking]]], admission: Admission, timing: Timing, what: str = "GRU step"
    ) -> tuple[tuple[Any, Ranking] | None, str | None]:
        """(the result of `call`, None), or (None, the fallback reason) when it failed or ran past the
        deadline; `what` names the call in the log line of a failure."""
        t0 = time.perf_counter()
        try:
            async with self._timeout(admission.deadline, t0):
                result = await call()
            timing.step_s = result[1].step_s
            timing.scoring = result[1].scoring
            if self.guarded:
                now = time.perf_counter()
                self.guard.breaker.record(admission.ticket, True)
                if admission.probe:
                    self.guard.latency.clear()  # the model answers in time again: measure afresh
                self.guard.latency.observe((now - t0) / admission.steps, now)
            return result, None
        except asyncio.CancelledError:
            if self.guarded:
                self.guard.breaker.release(admission.ticket)
            raise
        except Exception as exc:  # noqa: BLE001 - whatever the model does wrong, the visitor gets the fallback
            if self.guarded:
                self.guard.breaker.record(admission.ticket, False)
            if isinstance(exc, TimeoutError):
                return None, "deadline"
            log.error("%s failed, answering from the neighbour table: %s", what, type(exc).__name__)
            return None, "model_error"
        finally:
            timing.model_s += time.perf_counter() - t0
            if admission.probe:
                self._probing = False

    def _timeout(self, deadline: float, now: float) -> Any:
        if not self.guarded:
            return _NO_TIMEOUT
        return asyncio.timeout(deadline - now if deadline > now else 0.0)
