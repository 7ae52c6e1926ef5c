"""Capacity from a judged ramp, on hand-made steps."""

from __future__ import annotations

import math

import pytest

from loadtest.capacity import find_capacity
from service.errors import LoadTestError


def report(*steps: tuple[float, float, list[str]], served_here: bool = False, bottleneck: bool = False) -> dict:
    return {
        "steps": [{"index": k, "target_rps": t, "rps": a, "failures": f} for k, (t, a, f) in enumerate(steps)],
        "load_generator": {"cpu_count": 2, "bottleneck": bottleneck},
        "target": {"served_here": served_here},
    }


def test_the_ramp_stops_at_its_first_failing_step() -> None:
    r = report((100, 99.0, []), (200, 195.0, []), (300, 240.0, ["p99 40 ms > budget 25 ms"]), (400, 390.0, []))
    c = find_capacity(r, service_cores=2, target_rate=1000, headroom=0.7)
    assert c["found"] and not c["ramp_exhausted"]
    assert (c["rate_rps"], c["step_target_rps"], c["per_core_rps"]) == (195.0, 200, 97.5)
    assert c["first_failing_step"] == 2 and "p99 40 ms" in c["why"]
    assert c["cores_needed"] == math.ceil(1000 / (97.5 * 0.7)) == 15
    assert c["cores_needed_at_full"] == 11
    assert c["replicas_needed"] == 8  # replicas of 2 cores each
    assert "this machine (2 CPU core(s)" in c["caveat"]


def test_every_step_holding_means_at_least_the_top_rate() -> None:
    c = find_capacity(report((10, 10.0, []), (20, 20.0, [])), service_cores=1, target_rate=None, headroom=0.7)
    assert c["found"] and c["ramp_exhausted"] and c["rate_rps"] == 20.0 and c["cores_needed"] is None


def test_no_step_holding_finds_nothing() -> None:
    c = find_capacity(report((10, 10.0, ["error rate 5.00% > allowed 0.10%"]), served_here=True, bottleneck=True), 1, 100, 0.7)
    assert not c["found"] and c["rate_rps"] is None and c["cores_needed"] is None
    assert "competing for its cores" in c["caveat"] and "ran out of CPU" in c["caveat"]


@pytest.mark.parametrize("cores, target, headroom, named", [(0, None, 0.7, "--service-cores"), (1, -5, 0.7, "--target-rate"), (1, None, 1.5, "--headroom")])
def test_bad_sizing_values_are_named(cores: float, target: float | None, headroom: float, named: str) -> None:
    with pytest.raises(LoadTestError, match=named):
        find_capacity(report((10, 10.0, [])), cores, target, headroom)
