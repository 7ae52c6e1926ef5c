"""`cairn simulate`: a short online experiment on the demo shop, GRU against a simple recommender,
with simulated visitors (loadtest/visitors.py) driving the real service over HTTP.

    cairn simulate --scenario data/demo/raw/scenario.npz --artifact garden-gru/demo \\
        [--control neighbours] [--visits 1500] [--out reports/demo/online] [--offline-report reports/demo/evaluation.json]

It writes an experiment declaration (two arms on the artifact, half the visits each: the control
recommender first, then the GRU), starts `cairn serve` on a free loopback port with that experiment
and a folder of click events, runs the visitors, stops the service (which flushes the events), and
writes `cairn experiment report` into OUT/report. With --offline-report it prints the offline
verdict (Recall@20 on the held-out day) beside the online one and says whether they agree.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from pathlib import Path

import httpx

from bench.harness.ports import free_port
from bench.harness.processes import launch, log_tail, stop_process, wait_http
from loadtest.visitors import Visitors, http_shop, run_visitors
from offline.demo.params import ScenarioParams
from offline.demo.scenario import Scenario
from offline.online.event_source import read_events
from offline.online.report import build_report, format_markdown, write_report
from service.errors import BenchError, CairnError, LoadTestError
from service.events.experiment import load_experiment

CONTROLS = ("neighbours", "popularity")
OFFLINE_NAMES = {"neighbours": "item-knn", "popularity": "pop"}  # the offline baselines closest to each control


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--scenario", type=Path, required=True, help="the demo's scenario.npz (cairn demo-data --out)")
    parser.add_argument("--artifact", required=True, metavar="NAME/VERSION", help="the artifact both arms serve, e.g. garden-gru/demo")
    parser.add_argument("--artifacts", type=Path, default=Path("model_store"), help="the artifacts folder (default model_store)")
    parser.add_argument("--control", default="neighbours", help=f"the control arm's recommender: {' or '.join(CONTROLS)} (default neighbours)")
    parser.add_argument("--visits", type=int, default=1500, help="simulated visits (default 1500)")
    parser.add_argument("--count", type=int, default=10, help="items shown per click (default 10)")
    parser.add_argument("--seed", type=int, default=0, help="seeds the visitors and the experiment's salt (default 0)")
    parser.add_argument("--out", type=Path, default=Path("reports/demo/online"), help="folder for the declaration, events and report")
    parser.add_argument("--offline-report", type=Path, help="`cairn evaluate --out` JSON, for the offline verdict beside the online one")


def run(args: argparse.Namespace) -> int:
    if args.control not in CONTROLS:
        raise LoadTestError(f"--control {args.control!r}: choose {' or '.join(CONTROLS)}")
    if not 10 <= args.visits <= 1_000_000:
        raise LoadTestError(f"--visits {args.visits}: use 10 to 1,000,000")
    if not 1 <= args.count <= 100:
        raise LoadTestError(f"--count {args.count}: use 1 to 100")
    name, _, version = args.artifact.partition("/")
    if not (args.artifacts / name / version).is_dir() or not version:
        raise LoadTestError(f"--artifact {args.artifact!r}: no such artifact in {args.artifacts} (see `cairn artifacts`)")
    scenario = Scenario.load(args.scenario)
    out: Path = args.out
    events = out / "events"
    events.mkdir(parents=True, exist_ok=True)
    for old in events.glob("events-*.jsonl"):  # this command's own earlier run
        old.unlink()
    declaration = out / "experiment.json"
    declaration.write_text(json.dumps({
        "name": f"gru-vs-{args.control}", "salt": f"simulate-{args.seed:08d}",
        "arms": [
            {"name": args.control, "artifact": args.artifact, "recommender": args.control, "share": 0.5},
            {"name": "gru", "artifact": args.artifact, "recommender": "gru", "share": 0.5},
        ],
    }, indent=2) + "\n", encoding="utf-8")  # fmt: skip
    experiment = load_experiment(declaration)

    port = free_port()
    env = {k: v for k, v in os.environ.items() if not k.startswith("CAIRN_")}
    env.update(CAIRN_ARTIFACTS=str(args.artifacts.resolve()), CAIRN_EXPERIMENT=str(declaration.resolve()),
               CAIRN_EVENTS=str(events.resolve()), CAIRN_LOG_LEVEL="warning")  # fmt: skip
    log_path = out / "serve.log"
    proc = launch([sys.executable, "-m", "service.cli", "serve", "--port", str(port)], log_path=log_path, env=env, group=True)
    try:
        try:
            wait_http(proc, port, "/readyz", timeout_s=120, log_path=log_path)
        except BenchError as exc:
            raise LoadTestError(str(exc)) from None
        visitors = Visitors(scenario, stop_prob=ScenarioParams().stop_prob, seed=args.seed)
        with httpx.Client(base_url=f"http://127.0.0.1:{port}", timeout=10) as client:
            try:
                stats = run_visitors(visitors, http_shop(client, args.count), args.visits, prefix=f"sim{args.seed}")
            except httpx.HTTPError as exc:
                raise LoadTestError(f"the service failed during the simulation ({exc}):\n{log_tail(log_path)}") from None
    finally:
        stop_process(proc)  # SIGTERM: the service flushes its events

    batch = read_events(str(events))
    report = build_report(batch.events, experiment, seed=args.seed, skipped=batch.skipped)
    paths = write_report(report, out / "report")
    print(f"{stats.visits} simulated visits, {stats.clicks} clicks ({stats.took_shown} took a shown item)\n")
    print(format_markdown(report))
    if args.offline_report is not None:
        print(offline_beside_online(args.offline_report, args.control, report))
    print("wrote " + ", ".join(str(p) for p in paths))
    return 1 if report.sample_ratio is not None and report.sample_ratio.mismatch else 0


def offline_beside_online(path: Path, control: str, report) -> str:
    try:
        results = json.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise CairnError(f"--offline-report {str(path)!r}: cannot read it ({exc})") from None
    baseline = OFFLINE_NAMES[control]
    grus = {k: v for k, v in results.items() if k.startswith("gru") and isinstance(v, dict) and "recall@20" in v}
    if baseline not in results or not grus:
        return f"offline: {path} has no recall@20 for a GRU and {baseline}; nothing to compare"
    best = max(grus, key=lambda k: grus[k]["recall@20"]["value"])
    off_gru, off_base = grus[best]["recall@20"]["value"], results[baseline]["recall@20"]["value"]
    offline_says = "gru" if off_gru > off_base else baseline
    (diff,) = report.differences
    online_says = "gru" if diff.ci[0] > 0 else (control if diff.ci[1] < 0 else None)
    lines = [
        f"offline (Recall@20, held-out day): {best} {off_gru:.4f} vs {baseline} {off_base:.4f} -> {offline_says} ahead",
        f"online (hit rate, simulated visitors): {diff.verdict}",
    ]
    if online_says is None:
        lines.append("agreement: the online run cannot tell them apart (more --visits); offline favours " + offline_says)
    else:
        lines.append(f"agreement: {'yes' if (online_says == 'gru') == (offline_says == 'gru') else 'NO'}")
    return "\n".join(lines) + "\n"
