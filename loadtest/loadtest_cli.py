"""`cairn loadtest`: replay held-out visits against the service and judge the page budget.

Exit code 0 when every step met the budget, 1 when one did not, 2 on bad input. The report goes
to `--report DIR` as loadtest.json and loadtest.md (fields: service/load/report.py).
"""

from __future__ import annotations

import argparse
from pathlib import Path

from loadtest.budget import Budget
from service.errors import LoadTestError
from loadtest.setup import LoadTestSetup, parse_ramp, run_load_test, step_line
from bench.harness.service_process import MODELS, ServiceSpec
from loadtest.plan import REPLAY_MODES
from loadtest.report import write_report

SERVE_ONLY = ("recommender", "session_store", "artifacts", "artifact_name", "artifact_version", "workers", "port")


def add_target_arguments(parser: argparse.ArgumentParser) -> None:
    g = parser.add_argument_group("service under load (one of --url, --serve)")
    g.add_argument("--url", help="base URL of a running service, e.g. http://127.0.0.1:8000")
    g.add_argument("--serve", action="store_true", help="start the service here on a free loopback port, stop it at the end")
    g.add_argument("--recommender", choices=MODELS, help="with --serve: the recommender to run (CAIRN_RECOMMENDER)")
    g.add_argument("--session-store", help="with --serve: session store, 'memory' or a redis:// URL (CAIRN_SESSION_STORE)")
    g.add_argument("--artifacts", type=Path, help="with --serve: folder of model artifacts (CAIRN_ARTIFACTS)")
    g.add_argument("--artifact-name", help="with --serve: artifact name (CAIRN_ARTIFACT_NAME)")
    g.add_argument("--artifact-version", help="with --serve: artifact version (CAIRN_ARTIFACT_VERSION)")
    g.add_argument("--workers", type=int, help="with --serve: service worker processes (default 1)")
    g.add_argument("--port", type=int, help="with --serve: the port to start it on (default: a free loopback port)")


def add_load_arguments(parser: argparse.ArgumentParser, ramp_required: bool = False) -> None:
    g = parser.add_argument_group("load")
    g.add_argument("--data", type=Path, required=True, help="prepared data set; its test sessions are the visits replayed")
    g.add_argument("--max-visits", type=int, help="replay only the first N test sessions")
    g.add_argument("--users", type=int, default=20, help="simulated visitors at once (default 20)")
    g.add_argument("--load-workers", type=int, help="Locust worker processes (default: the CPU cores the service does not use)")
    if not ramp_required:
        g.add_argument("--duration", type=float, help="seconds of load without --ramp (default 30)")
        g.add_argument("--rate", type=float, help="fixed target rate, requests/s (default: visitors pace themselves by think times)")
    g.add_argument(
        "--ramp",
        required=ramp_required,
        metavar="START:STOP:STEP",
        help="stepped ramp of target rates, requests/s, each held for --step-duration",
    )
    g.add_argument("--step-duration", type=float, default=10.0, help="seconds per ramp step (default 10)")
    g.add_argument("--count", type=int, default=10, help="items asked for per click (default 10)")
    g.add_argument(
        "--budget-ms", type=int, default=30,
        help="the per-request budget each click asks the service for (its budget_ms field), whole ms (default 30); "
        "the verdict's limit is --p99-budget-ms",
    )  # fmt: skip
    g.add_argument("--warmup", type=float, default=2.0, help="seconds of uncounted clicks before measuring; 0: none (default 2)")
    g.add_argument("--exclude-seen", action="store_true", help="ask the service to leave out items the visit has seen")
    g.add_argument("--think-scale", type=float, default=1.0, help="factor on the log's gaps between clicks; 0: no waiting (default 1)")
    g.add_argument("--max-think", type=float, default=30.0, help="cap of one wait between clicks, s (default 30)")
    g.add_argument("--replay", choices=REPLAY_MODES, default="loop", help="loop over the visits, or replay each once and stop (default loop)")
    b = parser.add_argument_group("page budget")
    b.add_argument(
        "--p99-budget-ms", type=float, default=50.0,
        help="the verdict: p99 latency measured at the load generator that the page allows, ms (default 50); "
        "each click's own budget is --budget-ms",
    )  # fmt: skip
    b.add_argument("--max-error-rate", type=float, default=0.001, help="share of failed clicks allowed (default 0.001)")
    b.add_argument(
        "--max-fallback-rate",
        type=float,
        default=0.01,
        help="share of answers allowed to fall back because of load or failure: budget, deadline, model_unavailable, "
        "model_error, store_unavailable (default 0.01)",
    )


def configure(parser: argparse.ArgumentParser) -> None:
    add_target_arguments(parser)
    add_load_arguments(parser)
    parser.add_argument("--report", type=Path, default=Path("reports/loadtest"), help="report folder (default reports/loadtest/)")


def build_setup(args: argparse.Namespace) -> LoadTestSetup:
    if args.serve and args.url:
        raise LoadTestError("--url and --serve exclude each other: load a running service or start one here")
    if not args.serve:
        given = [f"--{k.replace('_', '-')}" for k in SERVE_ONLY if getattr(args, k) is not None]
        if given:
            raise LoadTestError(f"{', '.join(given)} apply only with --serve")
    rate, duration = getattr(args, "rate", None), getattr(args, "duration", None)
    if args.ramp is not None:
        if rate is not None:
            raise LoadTestError("--rate and --ramp exclude each other")
        if duration is not None:
            raise LoadTestError("--duration and --ramp exclude each other: a ramp lasts its steps times --step-duration")
        step_rates: tuple[float | None, ...] = parse_ramp(args.ramp)
        step_duration = args.step_duration
    else:
        step_rates = (rate,)
        step_duration = 30.0 if duration is None else duration
    if not step_duration > 0:
        raise LoadTestError(f"{'--step-duration' if args.ramp else '--duration'} must be positive, got {step_duration}")
    if rate is not None and not rate > 0:
        raise LoadTestError(f"--rate must be positive, got {rate}")
    if args.max_visits is not None and args.max_visits < 1:
        raise LoadTestError(f"--max-visits must be at least 1, got {args.max_visits}")
    if args.count < 1:
        raise LoadTestError(f"--count must be at least 1, got {args.count}")
    if not args.budget_ms > 0:
        raise LoadTestError(f"--budget-ms must be positive, got {args.budget_ms}")
    if not args.think_scale >= 0:
        raise LoadTestError(f"--think-scale must be zero or positive, got {args.think_scale}")
    if not args.max_think >= 0:
        raise LoadTestError(f"--max-think must be zero or positive, got {args.max_think}")
    service = None
    if args.serve:
        service = ServiceSpec(
            recommender=args.recommender,
            session_store=args.session_store,
            artifacts=args.artifacts,
            artifact_name=args.artifact_name,
            artifact_version=args.artifact_version,
            workers=1 if args.workers is None else args.workers,
            port=args.port,
        )
    return LoadTestSetup(
        url=args.url,
        service=service,
        data=args.data,
        max_visits=args.max_visits,
        users=args.users,
        load_workers=args.load_workers,
        step_rates=step_rates,
        step_duration_s=step_duration,
        count=args.count,
        budget_ms=args.budget_ms,
        exclude_seen=args.exclude_seen,
        think_scale=args.think_scale,
        max_think_s=args.max_think,
        replay=args.replay,
        warmup_s=_nonnegative("--warmup", args.warmup),
        budget=Budget(p99_ms=args.p99_budget_ms, max_error_rate=args.max_error_rate, max_fallback_rate=args.max_fallback_rate),
    )


def _nonnegative(flag: str, value: float) -> float:
    if not value >= 0:
        raise LoadTestError(f"{flag} must be zero or positive, got {value}")
    return value


def say(line: str) -> None:
    print(line, flush=True)  # flushed: the lines show as they come in a pipe or a CI log too


def print_summary(report: dict, paths: tuple[Path, ...]) -> None:
    print("summary:")
    for row in report["steps"]:
        print(f"  {step_line(row, len(report['steps']))}, hit rate {row['hit_rate']}, generator CPU {row['generator_cpu_percent']:.0f}%")
    for note in report["load_generator"]["notes"]:
        print(f"note: {note}")
    print(f"budget {'met' if report['verdict']['met'] else 'NOT met'}; report: {', '.join(str(p) for p in paths)}")


def run(args: argparse.Namespace) -> int:
    setup = build_setup(args)
    report = run_load_test(setup, say=say)
    paths = write_report(report, args.report, "loadtest")
    print_summary(report, paths)
    return 0 if report["verdict"]["met"] else 1
