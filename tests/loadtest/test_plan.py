"""Load plans and the ramp syntax."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import pytest

from service.errors import LoadTestError
from loadtest.setup import parse_ramp
from loadtest.plan import LoadPlan

PLAN = LoadPlan(
    url="http://127.0.0.1:8000", users=4, load_workers=2, step_rates=(10.0, 20.0), step_duration_s=2.5,
    count=10, budget_ms=30, exclude_seen=False, think_scale=1.0, max_think_s=30.0, replay="loop",
    visits_file="/tmp/v.npz", out_dir="/tmp/out", run_id="lt0", request_timeout_s=10.0,
)  # fmt: skip


def test_round_trip_and_timing(tmp_path: Path) -> None:
    PLAN.write(tmp_path / "plan.json")
    assert LoadPlan.read(tmp_path / "plan.json") == PLAN
    assert (PLAN.n_steps, PLAN.total_duration_s, PLAN.paced) == (2, 5.0, True)
    assert [PLAN.step_at(t) for t in (-1.0, 0.0, 2.49, 2.5, 4.99, 5.0, 99.0)] == [0, 0, 0, 1, 1, 2, 2]


@pytest.mark.parametrize(
    "change, named",
    [
        ({"step_rates": (10.0, None)}, "either every step"),
        ({"step_rates": (0.0,)}, "0.0"),
        ({"step_rates": ()}, "at least one step"),
        ({"users": 0}, "users"),
        ({"count": 0}, "count"),
        ({"think_scale": -0.5}, "-0.5"),
        ({"replay": "twice"}, "'twice'"),
        ({"step_duration_s": float("inf")}, "inf"),
    ],
)
def test_bad_plans_are_refused(change: dict, named: str) -> None:
    with pytest.raises(LoadTestError, match=named):
        replace(PLAN, **change)


def test_ramp_includes_its_stop_when_the_steps_land_on_it() -> None:
    assert parse_ramp("10:50:20") == (10.0, 30.0, 50.0)
    assert parse_ramp("10:55:20") == (10.0, 30.0, 50.0)
    assert parse_ramp("5:5:1") == (5.0,)
    assert parse_ramp("0.5:1.5:0.5") == (0.5, 1.0, 1.5)


@pytest.mark.parametrize("spec", ["10:50", "a:b:c", "0:10:5", "10:5:1", "10:20:0", "1:1000:1"])
def test_bad_ramps_name_the_spec(spec: str) -> None:
    with pytest.raises(LoadTestError, match=repr(spec).replace(".", r"\.")):
        parse_ramp(spec)
