"""Judging a step against the page budget, and the load generator's own notes."""

from __future__ import annotations

from dataclasses import replace

import pytest

from loadtest.budget import Budget, budget_failures, generator_limited, generator_notes
from service.errors import LoadTestError
from loadtest.stats import StepSummary

STEP = StepSummary(
    index=0, target_rps=100.0, window_s=10.0, requests=1000, rps=100.0, p50_ms=2.0, p95_ms=5.0, p99_ms=8.0,
    max_ms=20.0, mean_ms=2.5, error_rate=0.0, errors={}, served_by={"gru": 1.0}, fallback_reason={"none": 1.0},
    hit_rate=0.3, hits=30, hit_events=100, visits_started=10, visits_completed=10, generator_cpu_percent=20.0,
)  # fmt: skip
BUDGET = Budget(p99_ms=10.0, max_error_rate=0.01)


def test_a_step_within_budget_has_no_failures() -> None:
    assert budget_failures(STEP, BUDGET) == []
    assert budget_failures(replace(STEP, p99_ms=10.0), BUDGET) == []  # "at most" the budget


def test_each_way_to_miss_the_budget_is_named() -> None:
    assert budget_failures(replace(STEP, p99_ms=10.5), BUDGET) == ["p99 10.500 ms > budget 10 ms"]
    assert budget_failures(replace(STEP, error_rate=0.02), BUDGET) == ["error rate 2.00% > allowed 1.00%"]
    assert budget_failures(replace(STEP, rps=85.0), BUDGET) == ["reached 85.0 of the target 100 requests/s"]
    assert budget_failures(replace(STEP, requests=0), BUDGET) == ["no requests were sent"]
    assert budget_failures(replace(STEP, rps=85.0, target_rps=None), BUDGET) == []  # no target: no rate to reach


def test_fallbacks_the_service_causes_count_against_the_budget_those_of_the_visit_do_not() -> None:
    strict = Budget(p99_ms=10.0, max_error_rate=0.01, max_fallback_rate=0.05)
    shed = replace(
        STEP, served_by={"neighbours": 0.9, "gru": 0.1}, fallback_reason={"budget": 0.86, "deadline": 0.04, "none": 0.1}
    )
    assert budget_failures(shed, strict) == ["fallbacks under load 90.00% (budget 86.0%, deadline 4.0%) > allowed 5.00%"]
    assert budget_failures(shed, BUDGET) == []  # the default allows any share: judge latency and errors only
    visit_driven = replace(STEP, fallback_reason={"unknown_item": 0.3, "no_history": 0.1, "none": 0.6})
    assert budget_failures(visit_driven, strict) == []
    assert budget_failures(replace(STEP, fallback_reason={"store_unavailable": 0.05, "none": 0.95}), strict) == []  # "at most"
    with pytest.raises(LoadTestError, match="--max-fallback-rate"):
        Budget(p99_ms=10.0, max_error_rate=0.01, max_fallback_rate=1.5)


def test_generator_notes_tell_cpu_from_too_few_visitors() -> None:
    assert generator_notes(STEP, users=4) == []
    busy = replace(STEP, generator_cpu_percent=97.0)
    assert generator_limited(busy) and "97% CPU" in generator_notes(busy, users=4)[0]
    # Little's law: 4 visitors at 50 ms each finish at most 80 requests/s; 79/s is that bound.
    starved = replace(STEP, rps=79.0, mean_ms=50.0)
    [note] = generator_notes(starved, users=4)
    assert "all 4 visitors waiting" in note and "at most 80/s" in note
    slow = replace(STEP, rps=50.0, mean_ms=2.0)  # far below the bound of 2000/s: not the visitors
    assert generator_notes(slow, users=4) == ["achieved 50.0 of 100 requests/s"]


@pytest.mark.parametrize("p99, rate, named", [(0.0, 0.1, "--p99-budget-ms"), (5.0, 1.5, "--max-error-rate")])
def test_bad_budgets_are_refused(p99: float, rate: float, named: str) -> None:
    with pytest.raises(LoadTestError, match=named):
        Budget(p99_ms=p99, max_error_rate=rate)
