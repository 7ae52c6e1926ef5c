"""Send clicks at a target rate: one schedule shared by all visitors of a worker process.

Each click takes the next free slot of the schedule, slots 1/rate apart, and waits for it. A
visitor that comes late takes the present moment instead of a missed slot, so a stall is never
made up by a burst (the schedule is open-loop only while visitors are free to take slots; when
all are busy waiting for answers the achieved rate falls below the target, and the report says
so). The visitors of one process are greenlets of one thread, so the schedule needs no lock.
"""

from __future__ import annotations

from collections.abc import Callable


class Pacer:
    def __init__(self, step_rates: tuple[float, ...], step_duration_s: float, start: float, clock: Callable[[], float]):
        self._intervals = tuple(1.0 / r for r in step_rates)  # seconds between slots, per step
        self._step_duration_s = step_duration_s
        self._start = start
        self._end = start + len(step_rates) * step_duration_s
        self._clock = clock
        self._next = start

    def take_slot(self) -> tuple[int, float] | None:
        """(step index, seconds to wait) of the next slot, or None when the plan is over."""
        now = self._clock()
        slot = max(self._next, now)
        if slot >= self._end:
            return None
        step = int((slot - self._start) // self._step_duration_s)
        self._next = slot + self._intervals[step]
        return step, slot - now
