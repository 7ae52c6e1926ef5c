"""Load testing and capacity sizing: replay held-out visits against the service with Locust.

`cairn loadtest` (loadtest_cli) and `cairn capacity` (capacity_cli) build a `LoadTestSetup`,
`run_load_test` turns it into a Locust run (runner, over loadtest/locustfile.py) against a given
URL or a service started here (local_service), and report writes the result as JSON and Markdown.
"""

from service.load.budget import Budget
from service.load.capacity import find_capacity
from service.load.errors import LoadTestError
from service.load.local_service import LocalService, ServiceSpec
from service.load.loadtest import LoadTestSetup, parse_ramp, run_load_test
from service.load.plan import LoadPlan
from service.load.replay import VisitSet, visits_from_data
from service.load.report import render_markdown, write_report

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
