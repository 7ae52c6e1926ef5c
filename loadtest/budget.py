"""The page budget a load step is judged against, and what the load generator's own numbers say.

A step meets the budget when it got answers, its p99 latency is at most the budget, its error
rate at most the allowed one, its share of answers that fell back because of load or failure at
most the allowed one, and, when it had a target rate, it reached at least RATE_REACHED of it: a
step that never got to its target rate says nothing about that rate.

Fallbacks that the visit causes (an item the model does not know, a visit without clicks) are not
counted against the budget; those the service causes are (the model did not fit in the budget or
ran past it, a breaker was open, the model or the store failed). A service that keeps its latency
by answering everything from the neighbour table has not served the model at that rate.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from service.errors import LoadTestError
from loadtest.stats import StepSummary

RATE_REACHED = 0.9  # share of the target rate a step must reach to count as run at that rate
GENERATOR_CPU_LIMIT = 90.0  # % of one core: above it the generator may limit the rate (Locust warns at 90% too)


LOAD_FALLBACKS = ("budget", "deadline", "model_unavailable", "model_error", "store_unavailable")


@dataclass(frozen=True)
class Budget:
    p99_ms: float
    max_error_rate: float
    max_fallback_rate: float = 1.0

    def __post_init__(self) -> None:
        if not (self.p99_ms > 0 and math.isfinite(self.p99_ms)):
            raise LoadTestError(f"--p99-budget-ms must be a positive number, got {self.p99_ms}")
        if not 0 <= self.max_error_rate <= 1:
            raise LoadTestError(f"--max-error-rate must lie in 0..1, got {self.max_error_rate}")
        if not 0 <= self.max_fallback_rate <= 1:
            raise LoadTestError(f"--max-fallback-rate must lie in 0..1, got {self.max_fallback_rate}")


def load_fallback_rate(step: StepSummary) -> float:
    """Share of the step's answers that fell back because of load or failure (LOAD_FALLBACKS)."""
    return sum(step.fallback_reason.get(reason, 0.0) for reason in LOAD_FALLBACKS)


def budget_failures(step: StepSummary, budget: Budget) -> list[str]:
    """Why `step` misses the budget; empty when it meets it."""
    out = []
    if step.requests == 0:
        return ["no requests were sent"]
    if step.p99_ms > budget.p99_ms:
        out.append(f"p99 {step.p99_ms:.3f} ms > budget {budget.p99_ms:g} ms")
    if step.error_rate > budget.max_error_rate:
        out.append(f"error rate {step.error_rate:.2%} > allowed {budget.max_error_rate:.2%}")
    fell_back = load_fallback_rate(step)
    if fell_back > budget.max_fallback_rate:
        reasons = ", ".join(f"{r} {step.fallback_reason[r]:.1%}" for r in LOAD_FALLBACKS if step.fallback_reason.get(r))
        out.append(f"fallbacks under load {fell_back:.2%} ({reasons}) > allowed {budget.max_fallback_rate:.2%}")
    if step.target_rps is not None and step.rps < RATE_REACHED * step.target_rps:
        out.append(f"reached {step.rps:.1f} of the target {step.target_rps:g} requests/s")
    return out


def generator_notes(step: StepSummary, users: int) -> list[str]:
    """What the load generator's own numbers say about whether it, not the service, set the pace."""
    notes = []
    if step.generator_cpu_percent >= GENERATOR_CPU_LIMIT:
        notes.append(
            f"load generator at {step.generator_cpu_percent:.0f}% CPU (busiest worker process): it may be what "
            "limits the rate and adds to the latencies; use more --load-workers, or cores the service does not use"
        )
    if step.target_rps is not None and step.requests and step.rps < RATE_REACHED * step.target_rps:
        mean_s = step.mean_ms / 1000.0
        # Little's law (Little 1961): N visitors each waiting `mean` per request complete at most
        # N / mean requests/s. If the achieved rate is near that bound, the visitors ran out.
        bound = users / mean_s if mean_s > 0 else math.inf
        if step.rps >= 0.8 * bound:
            notes.append(
                f"achieved {step.rps:.1f} of {step.target_rps:g} requests/s with all {users} visitors waiting on "
                f"answers (at most {bound:.0f}/s at {step.mean_ms:.1f} ms each): the service is saturated, or raise --users"
            )
        elif step.generator_cpu_percent < GENERATOR_CPU_LIMIT:
            notes.append(f"achieved {step.rps:.1f} of {step.target_rps:g} requests/s")
    return notes


def generator_limited(step: StepSummary) -> bool:
    return step.generator_cpu_percent >= GENERATOR_CPU_LIMIT
