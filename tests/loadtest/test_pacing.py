"""The pacing schedule, on a clock the test moves by hand."""

from __future__ import annotations

import pytest

from loadtest.pacing import Pacer


class ManualClock:
    def __init__(self, t: float) -> None:
        self.t = t

    def __call__(self) -> float:
        return self.t


def test_slots_follow_the_step_rates_and_end_with_the_plan() -> None:
    clock = ManualClock(100.0)
    pacer = Pacer((4.0, 8.0), step_duration_s=1.0, start=100.0, clock=clock)
    due = []
    for _ in range(20):
        slot = pacer.take_slot()
        if slot is None:
            break
        step, wait = slot
        clock.t += wait  # the visitor sleeps until its slot, then sends
        due.append((step, round(clock.t - 100.0, 6)))
    # 4/s in the first second, 8/s in the second: 4 + 8 slots.
    assert due == [(0, 0.0), (0, 0.25), (0, 0.5), (0, 0.75)] + [(1, 1.0 + k / 8) for k in range(8)]
    assert pacer.take_slot() is None


def test_a_late_visitor_takes_the_present_not_a_burst() -> None:
    clock = ManualClock(0.0)
    pacer = Pacer((10.0,), step_duration_s=5.0, start=0.0, clock=clock)
    assert pacer.take_slot() == (0, 0.0)
    clock.t = 1.0  # nobody asked for 0.9 s: those slots are gone
    assert pacer.take_slot() == (0, 0.0)
    step, wait = pacer.take_slot()  # the next one is 1/10 s after the present
    assert step == 0 and wait == pytest.approx(0.1)
