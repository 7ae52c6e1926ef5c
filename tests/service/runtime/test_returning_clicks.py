"""The return watch: a step runner waits for the clicks that come straight back (a closed loop of a
few visits) and never under open traffic."""

from __future__ import annotations

import asyncio
import time

import numpy as np

from service.runtime.batching import StepBatcher
from service.runtime.returning_clicks import SHARE_MIN, SMOOTHING, WINDOW_MAX_S, WINDOW_SHARE, ReturnWatch


def test_share_is_a_moving_average_of_the_clicks_back_within_the_window():
    watch = ReturnWatch()
    t, step_s = 0.0, 0.010
    shares = []
    for _ in range(6):
        t += step_s
        watch.step_ended(t, 8, step_s)
        for k in range(8):  # every click back 1 ms later: inside the 2.5 ms window
            watch.arrived(t + 0.001 + k * 1e-5)
        watch.arrived(t + 0.003)  # past the window: not counted
        shares.append(watch.share)
    # Folded at the next step's end; every click came back, so both averages grow alike.
    assert shares == [0.0, 1.0, 1.0, 1.0, 1.0, 1.0]


def test_share_weighs_steps_by_their_clicks():
    watch = ReturnWatch()
    watch.step_ended(0.0, 8, 0.010)
    for k in range(8):
        watch.arrived(0.001)
    watch.step_ended(0.010, 1, 0.010)  # 8 of 8 back; then a lone click, not back
    watch.step_ended(0.020, 1, 0.010)
    # Exponential smoothing by hand (a = SMOOTHING): back 8a then 8a(1 - a); stepped 8a, then
    # 8a(1 - a) + a. The ratio, not a mean of per-step shares (which would give 1 - a).
    a = SMOOTHING
    assert np.isclose(watch.share, 8 * a * (1 - a) / (8 * a * (1 - a) + a))


def test_wait_asks_for_the_clicks_not_yet_back_until_the_window_closes():
    watch = ReturnWatch()
    watch.share = 1.0
    watch.step_ended(1.0, 8, 0.010)
    end = 1.0 + WINDOW_SHARE * 0.010
    watch.arrived(1.0005)
    watch.arrived(1.0006)
    assert watch.wait_for(1.001) == (6, end)
    assert watch.wait_for(end) == (0, end)  # closed
    watch.share = SHARE_MIN - 0.01
    assert watch.wait_for(1.001) == (0, 1.001)  # too few came back lately


def test_the_window_is_capped():
    watch = ReturnWatch()
    watch.share = 1.0
    watch.step_ended(0.0, 4, 1.0)  # a one-second step: the window is WINDOW_MAX_S, not 250 ms
    assert watch.wait_for(0.0) == (4, WINDOW_MAX_S)


def simulated_open_traffic(rate: float, seed: int, seconds: float = 12.0, max_batch: int = 64) -> float:
    """`seconds` of Poisson arrivals at `rate` into a runner that scores the queued clicks (up to `max_batch`, the
    service's default) in one step of 2 ms + 1 ms a click (the shape of a memory-bound pass), never
    waiting: the highest share the watch reached after its first 50 steps."""
    rng = np.random.default_rng(seed)
    clicks = int(rate * seconds)
    arrivals = np.cumsum(rng.exponential(1 / rate, clicks))
    watch = ReturnWatch()
    t, i, top, steps = 0.0, 0, 0.0, 0
    while i < clicks:
        t = max(t, arrivals[i])
        n = min(max_batch, int(np.searchsorted(arrivals, t, side="right")) - i)
        step_s = 0.002 + 0.001 * n
        t += step_s
        # What arrived during the step was reported to the previous window as it came.
        watch.step_ended(t, n, step_s)
        i += n
        later = arrivals[i:]
        for a in later[(later > t) & (later <= t + WINDOW_MAX_S)]:
            watch.arrived(a)
        steps += 1
        if steps > 50:
            top = max(top, watch.share)
    assert steps > 100, steps  # the share was sampled over many steps
    return top


def test_open_traffic_stays_below_the_bar_at_every_load():
    # Up to past saturation (one click costs 1 ms a click on top of 2 ms a step: 1,000/s at most).
    for rate in (20.0, 100.0, 300.0, 600.0, 900.0, 1500.0):
        assert simulated_open_traffic(rate, seed=int(rate)) < SHARE_MIN, rate


class SlowStep:
    """A stand-in step of fixed cost that records each call's batch size."""

    layers, hidden_size, n_items = 1, 4, 50

    def __init__(self, seconds: float) -> None:
        self.seconds = seconds
        self.sizes: list[int] = []

    def run(self, items, hidden, top_n):
        self.sizes.append(len(items))
        time.sleep(self.seconds)
        b = len(items)
        return hidden.copy(), np.tile(np.arange(top_n, dtype=np.int64), (b, 1)), np.zeros((b, top_n), np.float32)


def test_a_closed_loop_of_eight_visits_shares_one_pass_instead_of_two_groups_taking_turns():
    step = SlowStep(0.020)
    zero = np.zeros((1, 4), np.float32)

    async def visit(batcher: StepBatcher, back_after_s: float, clicks: int) -> None:
        for _ in range(clicks):
            await batcher.run(1, zero, 3)
            await asyncio.sleep(back_after_s)  # answered, then the next click: half the visits 2 ms later

    async def go():
        batcher = StepBatcher(step, inline_max_s=0.0)
        batcher.start()
        try:
            await asyncio.gather(*(visit(batcher, 0.002 * (v % 2), 24) for v in range(8)))
        finally:
            await batcher.close()
        return batcher

    batcher = asyncio.run(go())
    # Without waiting, the fast and the slow half split into two groups of 4 that take turns.
    late = step.sizes[len(step.sizes) // 2 :]
    assert batcher.held_clicks > 0
    assert np.mean(late) >= 7, step.sizes


def test_spaced_clicks_are_never_held():
    step = SlowStep(0.005)
    zero = np.zeros((1, 4), np.float32)

    async def go():
        batcher = StepBatcher(step, inline_max_s=0.0)
        batcher.start()
        try:
            for _ in range(20):
                await batcher.run(1, zero, 3)
                await asyncio.sleep(0.015)  # the next click long after the window closed
        finally:
            await batcher.close()
        return batcher

    batcher = asyncio.run(go())
    assert batcher.held_clicks == 0 and batcher._returns.share == 0.0


def test_a_step_run_on_the_loop_opens_no_window():
    # Requests that arrive during a step run on the event loop are read after it: counting them as
    # returns would make a lone click's every follower look like one.
    step = SlowStep(0.004)
    zero = np.zeros((1, 4), np.float32)

    async def go():
        batcher = StepBatcher(step, inline_max_s=1.0)  # every lone step on the loop
        batcher.start()
        try:
            for _ in range(30):
                await batcher.run(1, zero, 3)  # the next click at once: within any window
        finally:
            await batcher.close()
        return batcher

    batcher = asyncio.run(go())
    assert batcher.inline_calls == 30 and batcher._returns.share == 0.0
