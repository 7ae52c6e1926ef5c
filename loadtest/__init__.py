"""Load testing and capacity sizing: replay held-out visits against the service with Locust.

`cairn loadtest` (loadtest_cli) and `cairn capacity` (capacity_cli) build a `LoadTestSetup`,
`run_load_test` turns it into a Locust run (runner, over loadtest/locustfile.py) against a given
URL or a service started here (local_service), and report writes the result as JSON and Markdown.
"""

from loadtest.budget import Budget
from loadtest.capacity import find_capacity
from service.errors import LoadTestError
from bench.harness.service_process import LocalService, ServiceSpec
from loadtest.setup import LoadTestSetup, parse_ramp, run_load_test
from loadtest.plan import LoadPlan
from loadtest.replay import VisitSet, visits_from_data
from loadtest.report import render_markdown, write_report

__all__ = [
    "Budget",
    "LoadPlan",
    "LoadTestError",
    "LoadTestSetup",
    "LocalService",
    "ServiceSpec",
    "VisitSet",
    "find_capacity",
    "parse_ramp",
    "render_markdown",
    "run_load_test",
    "visits_from_data",
    "write_report",
]
