"""`cairn capacity`: a stepped ramp finds the highest rate per service core that meets the budget.

Exit code 0 when some step met the budget (a capacity was found), 1 when not even the first did,
2 on bad input. Report: `--report DIR` as capacity.json and capacity.md.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from loadtest.capacity import REPORT_KIND, check_sizing, find_capacity
from service.errors import LoadTestError
from loadtest.setup import run_load_test
from loadtest.loadtest_cli import add_load_arguments, add_target_arguments, build_setup, print_summary, say
from loadtest.report import write_report

HEADROOM = 0.7  # plan to run at 70% of measured capacity, room for spikes and a lost replica (common practice)


def configure(parser: argparse.ArgumentParser) -> None:
    add_target_arguments(parser)
    add_load_arguments(parser, ramp_required=True)
    c = parser.add_argument_group("sizing")
    c.add_argument("--service-cores", type=float, help="CPU cores the service used (default with --serve: its --workers)")
    c.add_argument("--target-rate", type=float, help="requests/s to size for: the report says how many cores and replicas")
    c.add_argument("--headroom", type=float, default=HEADROOM, help=f"share of measured capacity to plan with (default {HEADROOM})")
    parser.add_argument("--report", type=Path, default=Path("reports/capacity"), help="report folder (default reports/capacity/)")


def run(args: argparse.Namespace) -> int:
    setup = build_setup(args)
    cores = args.service_cores
    if cores is None:
        if setup.service is None:
            raise LoadTestError("--service-cores is needed with --url: the service's cores cannot be seen from here")
        cores = float(setup.service.workers)
    check_sizing(cores, args.target_rate, args.headroom)  # before minutes of load, not after
    report = run_load_test(setup, say=say)
    report["kind"] = REPORT_KIND
    report["capacity"] = find_capacity(report, cores, args.target_rate, args.headroom)
    paths = write_report(report, args.report, "capacity")
    print_summary(report, paths)
    cap = report["capacity"]
    if cap["found"]:
        print(f"capacity: {cap['rate_rps']:.1f} req/s on {cores:g} core(s) = {cap['per_core_rps']:.1f} req/s per core")
        if cap["target_rate"] is not None:
            print(f"for {cap['target_rate']:g} req/s: {cap['cores_needed']} core(s), {cap['replicas_needed']} replica(s)")
    else:
        print(f"capacity: no step met the budget ({cap['why']})")
    return 0 if cap["found"] else 1
