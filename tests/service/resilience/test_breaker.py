"""The circuit breaker's states and transitions, on an injected clock.

Reference: the circuit breaker as Michael Nygard describes it in "Release It!" (2007; 2nd ed. 2018,
chapter "Stability Patterns") and Martin Fowler's "CircuitBreaker" article (2014), from memory:
closed counts failures and trips open past a threshold; open fails fast until a timeout passes;
then half-open lets trial calls through, closing on success and opening again on failure.
"""

from __future__ import annotations

import logging

import pytest

from service.resilience.breaker import BreakerState, CircuitBreaker


class Clock:
    def __init__(self) -> None:
        self.now = 1000.0

    def __call__(self) -> float:
        return self.now


def breaker(clock: Clock, changes: list | None = None, **kw) -> CircuitBreaker:
    options = dict(window_s=10.0, min_calls=4, failure_ratio=0.5, cool_down_s=2.0, trial_calls=2)
    options.update(kw)
    on_change = None if changes is None else (lambda name, old, new: changes.append((name, old, new)))
    return CircuitBreaker("t", clock=clock, on_change=on_change, **options)


def call(b: CircuitBreaker, ok: bool) -> bool:
    """One guarded call; False when the breaker refused it."""
    ticket = b.allow()
    if ticket is None:
        return False
    b.record(ticket, ok)
    return True


def test_closed_needs_min_calls_and_the_ratio():
    clock = Clock()
    b = breaker(clock)
    for _ in range(3):
        assert call(b, False)  # 3 of 3 failed, but fewer than min_calls: still closed
    assert b.state is BreakerState.CLOSED
    assert call(b, False)  # 4 of 4
    assert b.state is BreakerState.OPEN


def test_below_the_ratio_stays_closed():
    clock = Clock()
    b = breaker(clock)
    for n in range(40):
        call(b, n % 3 != 2)  # every third fails: under the 50% threshold all along
    assert b.state is BreakerState.CLOSED and b.window() == (40, 13)


def test_old_outcomes_leave_the_window():
    clock = Clock()
    b = breaker(clock)
    for _ in range(3):
        call(b, False)
    clock.now += 10.5  # the three failures have left the 10 s window
    for _ in range(3):
        call(b, True)
    assert b.window() == (3, 0)
    call(b, False)
    assert b.state is BreakerState.CLOSED  # 1 of 4, not 4 of 7


def test_open_fails_fast_then_half_opens_and_closes_after_the_trials():
    clock = Clock()
    changes: list = []
    b = breaker(clock, changes)
    for _ in range(4):
        call(b, False)
    assert b.allow() is None  # open: refused without calling
    clock.now += 1.9
    assert b.allow() is None
    clock.now += 0.2  # cool-down over
    first, second = b.allow(), b.allow()
    assert first is not None and second is not None and b.state is BreakerState.HALF_OPEN
    assert b.allow() is None  # only trial_calls at a time
    b.record(first, True)
    assert b.state is BreakerState.HALF_OPEN and b.allow() is None  # one success is not enough yet
    b.record(second, True)
    assert b.state is BreakerState.CLOSED and b.window() == (0, 0)  # closed with an empty window
    assert [(o, n) for _, o, n in changes] == [
        (BreakerState.CLOSED, BreakerState.OPEN),
        (BreakerState.OPEN, BreakerState.HALF_OPEN),
        (BreakerState.HALF_OPEN, BreakerState.CLOSED),
    ]
    assert b.transitions == {(o, n): 1 for _, o, n in changes}


def test_a_failed_trial_opens_again_for_a_new_cool_down():
    clock = Clock()
    b = breaker(clock)
    for _ in range(4):
        call(b, False)
    clock.now += 2.0
    ticket = b.allow()
    b.record(ticket, False)
    assert b.state is BreakerState.OPEN
    clock.now += 1.0
    assert b.allow() is None  # the cool-down restarted at the failed trial
    clock.now += 1.0
    assert b.allow() is not None


def test_outcomes_of_calls_started_under_an_earlier_state_are_ignored():
    clock = Clock()
    b = breaker(clock)
    late = [b.allow() for _ in range(3)]  # started while closed
    for _ in range(4):
        call(b, False)
    clock.now += 2.0
    trial = b.allow()
    for ticket in late:
        b.record(ticket, True)  # must not count as successful trials
    assert b.state is BreakerState.HALF_OPEN
    b.record(trial, False)
    assert b.state is BreakerState.OPEN


def test_released_trial_tickets_can_be_used_again():
    clock = Clock()
    b = breaker(clock, trial_calls=1)
    for _ in range(4):
        call(b, False)
    clock.now += 2.0
    ticket = b.allow()
    assert b.allow() is None
    b.release(ticket)  # that request was cancelled before the call gave an answer
    assert b.allow() is not None


def test_reading_the_state_moves_an_open_breaker_past_its_cool_down_and_logs_changes(caplog):
    clock = Clock()
    b = breaker(clock)
    caplog.set_level(logging.INFO, logger="cairn.service")
    for _ in range(4):
        call(b, False)
    clock.now += 2.0
    assert b.state is BreakerState.HALF_OPEN
    messages = [r.getMessage() for r in caplog.records]
    assert "circuit breaker t: closed -> open (4 of 4 calls failed in the last 10 s)" in messages
    assert "circuit breaker t: open -> half-open (cool-down of 2 s over)" in messages
    b.reset("replaced")
    assert b.state is BreakerState.CLOSED and "circuit breaker t: half-open -> closed (replaced)" in [r.getMessage() for r in caplog.records]


@pytest.mark.parametrize("bad", [dict(window_s=0), dict(min_calls=0), dict(failure_ratio=0), dict(failure_ratio=1.5), dict(trial_calls=0)])
def test_bad_thresholds_are_refused(bad):
    with pytest.raises(ValueError, match="breaker t"):
        breaker(Clock(), **bad)
