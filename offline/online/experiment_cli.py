"""`cairn experiment report --events SINK --out DIR [--experiment FILE]`: the experiment's verdict."""

from __future__ import annotations

import argparse
from pathlib import Path

from service.errors import ExperimentError
from service.events.experiment import load_experiment
from offline.online.event_source import read_events
from offline.online.report import build_report, format_markdown, write_report


def configure(parser: argparse.ArgumentParser) -> None:
    sub = parser.add_subparsers(dest="action", metavar="ACTION")
    sub.required = True
    report = sub.add_parser("report", help="per-arm hit rate, click-through, latency; bootstrap CIs; sample-ratio check",
                            description="per-arm hit rate, click-through, latency; bootstrap CIs; sample-ratio check")  # fmt: skip
    report.add_argument("--events", required=True, help="the sink: the events folder, or the redis:// URL")
    report.add_argument("--out", type=Path, required=True, help="folder for experiment.md, experiment.json, experiment.png")
    report.add_argument("--experiment", type=Path, help="the declaration the service ran (CAIRN_EXPERIMENT): shares for the sample-ratio check")
    report.add_argument("--redis-prefix", default="cairn:", help="with a redis:// sink: the service's CAIRN_REDIS_PREFIX (default cairn:)")
    report.add_argument("--bootstrap", type=int, default=2000, help="bootstrap replicates over visits (default 2000)")
    report.add_argument("--seed", type=int, default=0, help="seed of the bootstrap (default 0)")


def run(args: argparse.Namespace) -> int:
    if args.bootstrap < 100:
        raise ExperimentError(f"--bootstrap {args.bootstrap}: use at least 100 replicates")
    experiment = load_experiment(args.experiment) if args.experiment is not None else None
    batch = read_events(args.events, args.redis_prefix)
    report = build_report(batch.events, experiment, args.bootstrap, args.seed, batch.skipped)
    paths = write_report(report, args.out)
    print(format_markdown(report))
    print("wrote " + ", ".join(str(p) for p in paths))
    return 1 if report.sample_ratio is not None and report.sample_ratio.mismatch else 0
