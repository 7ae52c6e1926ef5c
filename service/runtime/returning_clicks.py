"""When the clicks a step answered come straight back, hold the next step a moment for them.

Under a closed loop of a few visits (each visit's next click follows its answer within a
millisecond or two: a load test of 8 visits at once, a storefront that asks again as soon as it is
answered) a step runner that never waits settles into groups that take turns. At a million items,
8 visits settle into two groups of 4: each click waits for the other group's pass, then its own.
One pass of 8 costs far less than two of 4 (int8 at a million items: 14-15 ms for 8 clicks, 9-11
ms for 4, on an AMD EPYC of this project's CI kind), so it pays to hold the clicks already queued
for the little time the others need to come back.

Under open traffic the clicks a step answered do not come back at once, and a wait would only add
latency. So the watch learns which regime it is in: it counts the clicks that arrive within a
window after each step ends, against that step's clicks (moving averages of both, so a run of lone
clicks weighs as little as it should), and asks for a wait only while their ratio, the share that
came back, is at least SHARE_MIN. A closed loop's clicks all come back: a share near 1. The window
is WINDOW_SHARE of the step's own time (at most WINDOW_MAX_S), which keeps open traffic below the
bar: at a rate r, a window of a quarter of a step of t seconds sees r t / 4 arrivals on average,
while that step scored at least r t of them when the runner is busy (and at least one when it is
not, with r t < 1), so the share stays near a quarter on average; with the moving averages' noise
it peaked at about 0.5 in a simulation from 20 to 1,500 clicks/s
(tests/service/runtime/test_returning_clicks.py). A fast step (40,000 items: under a millisecond)
gets a window too short to matter either way.
"""

from __future__ import annotations

WINDOW_SHARE = 0.25  # of the last step's time
WINDOW_MAX_S = 0.004
SHARE_MIN = 0.75  # of a step's clicks back within its window, on average, before the runner waits
SMOOTHING = 0.1  # weight of the latest step in the moving averages


class ReturnWatch:
    """Counts the clicks that come back right after each step; all times from one clock (seconds)."""

    def __init__(self) -> None:
        self.share = 0.0  # of the clicks stepped lately, the share back within their step's window
        self._mean_back = 0.0  # moving averages, per step
        self._mean_stepped = 0.0
        self._window_end = float("-inf")
        self._stepped = 0  # clicks the last step scored
        self._back = 0  # clicks that arrived since it ended, within its window

    def arrived(self, t: float) -> None:
        if t <= self._window_end:
            self._back += 1

    def step_ended(self, t: float, clicks: int, step_s: float) -> None:
        """A step of `clicks` clicks that took `step_s` ended at `t`. The previous step's count is
        folded in here: its window was shorter than the step that followed it, give or take."""
        if self._stepped:
            self._mean_back += SMOOTHING * (min(self._back, self._stepped) - self._mean_back)
            self._mean_stepped += SMOOTHING * (self._stepped - self._mean_stepped)
            self.share = self._mean_back / self._mean_stepped
        self._window_end = t + min(WINDOW_MAX_S, WINDOW_SHARE * step_s)
        self._stepped, self._back = clicks, 0

    def wait_for(self, now: float) -> tuple[int, float]:
        """(more clicks worth waiting for, until when): (0, now) when none."""
        if self.share < SHARE_MIN or now >= self._window_end:
            return 0, now
        expected = round(self.share * self._stepped)
        return max(0, expected - self._back), self._window_end
