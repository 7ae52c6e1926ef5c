"""How busy the event loop is: the time a task waits to run again after yielding once.

Every `interval_s` a background task yields (`asyncio.sleep(0)`) and measures how long it took to
get the loop back: all callbacks ready at that moment run first, so the wait is the loop's backlog.
An idle service measures microseconds; a saturated one, milliseconds. The model gate probes a
model it has stopped admitting only while the loop is idle (see model_gate.py): after a stall the
model comes back quickly, while under sustained overload no probe lets a flood of model calls in.
"""

from __future__ import annotations

import asyncio
import time
from collections import deque


class LoopLag:
    def __init__(self, interval_s: float = 0.1, keep: int = 10) -> None:
        self.interval_s = interval_s
        self._recent: deque[float] = deque(maxlen=keep)

    @property
    def recent_max_s(self) -> float:
        """The largest backlog of the last `keep` measurements; unknown (infinite) before the first."""
        return max(self._recent) if self._recent else float("inf")

    def record(self, lag_s: float) -> None:
        self._recent.append(lag_s)

    async def run(self) -> None:
        """Measure until cancelled."""
        while True:
            await asyncio.sleep(self.interval_s)
            t0 = time.perf_counter()
            await asyncio.sleep(0)
            self.record(time.perf_counter() - t0)
