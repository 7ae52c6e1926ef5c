"""`cairn evaluate`: measure recommenders on held-out sessions and decide which one to serve.

Prints one table (rows: recommenders; columns: each metric with its 95% interval), one verdict line
per GRU, then the decision (offline/evaluate/decision.py): the strongest simple recommender, the
best one's lift over it with its paired interval, the p99 cost per click and the recommendation.
Writes the same numbers as JSON: one entry per recommender (keyed by name) and `decision` (the
choices made on the validation split, costs per click, breakdowns, the Recall@k curves, the
verdict). With --report DIR it also writes the report (report.html, report.md, plots).
"""

from __future__ import annotations

import argparse
import importlib
import json
import sys
import time
from collections.abc import Callable
from pathlib import Path

from service.errors import ArtifactError, EvaluateOptionError
from offline.evaluate.baselines import ItemKNN, Markov, Popularity, SessionPopularity, click_counts
from offline.evaluate.session_knn import DEFAULT_CANDIDATES, DEFAULT_NEIGHBOURS, DEFAULT_WEIGHTING, WEIGHTINGS, SessionKNN
from offline.data.dataset import PreparedData
from offline.evaluate.evaluation import Result, evaluate, format_table, results_json, verdict_lines
from offline.evaluate.decision import build_decision
from offline.evaluate.scorer import SessionScorer
from offline.evaluate.scoring_paths import SCORING_PATHS, parse_scoring
from offline.evaluate.serving_cost import click_costs
from offline.evaluate.training_curve import validation_curve
from offline.evaluate.tuning import choose_exclude_seen, tune_session_knn

BASELINES = ("pop", "spop", "markov", "item-knn", "session-knn")
EXCLUDE_SEEN = ("on", "off", "auto")
DEFAULT_RECOMMENDERS = ",".join(BASELINES)



def configure(parser: argparse.ArgumentParser) -> None:
    # Numbers are read as text and checked in run(), so a bad value is one line naming it.
    parser.add_argument("--data", required=True, type=Path, metavar="DIR", help="prepared data set (from `cairn prepare`)")
    parser.add_argument("--split", choices=("test", "valid"), default="test", help="sessions to evaluate on (default test)")
    parser.add_argument("--sessions", default="0", metavar="N",
                        help="evaluate on a sample of N sessions of the split, drawn with --seed (default 0: all); "
                             "every recommender sees the same sample")
    parser.add_argument("--k", nargs="+", default=["20"], metavar="K", help="cut-offs of the top-k lists (default 20); several: --k 20 10")
    parser.add_argument(
        "--recommenders",
        default=DEFAULT_RECOMMENDERS,
        metavar="LIST",
        help=f"comma-separated baselines to fit on the training split, from {DEFAULT_RECOMMENDERS} (default all; '' for none)",
    )
    parser.add_argument("--scenario", type=Path, metavar="FILE", help="demo scenario file: adds its exact oracle")
    parser.add_argument("--checkpoint", type=Path, nargs="+", action="extend", default=[], metavar="PATH", help="GRU checkpoints from `cairn train`")
    parser.add_argument("--artifact", type=Path, nargs="+", action="extend", default=[], metavar="PATH", help="model artifacts (ONNX) from `cairn export`")
    parser.add_argument(
        "--scoring", nargs="+", type=_scoring, default=["exact"], metavar="PATH",
        help=f"how each --artifact scores the items, as CAIRN_SCORING does: {', '.join(SCORING_PATHS)}, or clustered@N "
        "(N clusters probed, as CAIRN_PROBE_CLUSTERS=N); several give a row each "
        "(e.g. --scoring exact clustered clustered@100: the offline cost of the approximation at two probe counts) (default exact)",
    )  # fmt: skip
    parser.add_argument("--knn-neighbours", default="100", metavar="N", help="neighbours kept per item by item-knn (default 100)")
    parser.add_argument("--knn-regulariser", default="20", metavar="L", help="item-knn support regulariser lambda (default 20)")
    parser.add_argument("--sknn-neighbours", default=str(DEFAULT_NEIGHBOURS), metavar="K", help=f"session-knn: neighbour sessions k (default {DEFAULT_NEIGHBOURS})")
    parser.add_argument("--sknn-candidates", default=str(DEFAULT_CANDIDATES), metavar="M", help=f"session-knn: most recent candidate sessions M (default {DEFAULT_CANDIDATES})")
    parser.add_argument("--sknn-weighting", choices=WEIGHTINGS, default=DEFAULT_WEIGHTING, help=f"session-knn: weights of the visit's clicks, linear = recent clicks weigh more (default {DEFAULT_WEIGHTING})")
    parser.add_argument("--tune", action="store_true", help="choose session-knn's k, M and weighting on the validation split (overrides the --sknn-* values)")
    parser.add_argument("--exclude-seen", choices=EXCLUDE_SEEN, default="off", help="rank the visit's clicked items last for every recommender, as the service does; auto: choose on the validation split (default off)")
    parser.add_argument("--p99-budget-ms", default="25", metavar="MS", help="page budget for one click's p99 in the verdict (default 25)")
    parser.add_argument("--cost-clicks", default="2000", metavar="N", help="clicks timed per recommender for its cost per click (default 2000; 0: not timed)")
    parser.add_argument("--report", type=Path, metavar="DIR", help="also write the report there: report.html, report.md, plots (PNG) and evaluation.json")
    parser.add_argument("--bootstrap", default="1000", metavar="N", help="bootstrap resamples of the sessions (default 1000)")
    parser.add_argument("--seed", default="0", metavar="N", help="seed of the bootstrap resamples (default 0)")
    parser.add_argument("--out", type=Path, metavar="FILE", help="JSON report (default DIR/evaluation-<split>.json)")


def run(args: argparse.Namespace) -> int:
    ks = parse_ks(args.k)
    names = parse_recommenders(args.recommenders)
    neighbours = _integer("--knn-neighbours", args.knn_neighbours, minimum=1)
    regulariser = _number("--knn-regulariser", args.knn_regulariser, minimum=0.0)
    bootstrap = _integer("--bootstrap", args.bootstrap, minimum=1)
    seed = _integer("--seed", args.seed, minimum=0)
    sknn = {
        "neighbours": _integer("--sknn-neighbours", args.sknn_neighbours, minimum=1),
        "candidates": _integer("--sknn-candidates", args.sknn_candidates, minimum=1),
        "weighting": args.sknn_weighting,
    }
    budget_ms = _number("--p99-budget-ms", args.p99_budget_ms, minimum=0.0)
    cost_clicks = _integer("--cost-clicks", args.cost_clicks, minimum=0)
    if not names and not args.scenario and not args.checkpoint and not args.artifact:
        raise EvaluateOptionError("nothing to evaluate: give --recommenders, --scenario, --checkpoint or --artifact")
    check_paths(args)  # before minutes of fitting, not after

    sessions = _integer("--sessions", args.sessions, minimum=0)
    data = PreparedData.load(args.data)
    split = data.split(args.split).sample(sessions, seed)
    if split.n_sessions < int((data.split(args.split).lengths() >= 2).sum()):
        # Ranking every item for every click costs clicks x items: at 631,430 items the test split's
        # 410,000 clicks take about 40 minutes a recommender here.
        print(f"evaluating on {split.n_sessions:,} of {data.split(args.split).n_sessions:,} {args.split} sessions (--sessions)", file=sys.stderr)
    counts = click_counts(data.train, data.n_items)
    k_main = 20 if 20 in ks else ks[0]
    tuning: list[dict] = []
    if args.tune and "session-knn" in names:
        started = time.perf_counter()
        sknn, tuning = tune_session_knn(data.train, data.valid, data.n_items, counts, k_main, exclude_seen=args.exclude_seen == "on")
        print(f"tuned session-knn on the validation split in {time.perf_counter() - started:.1f} s: {sknn}", file=sys.stderr)

    scorers: list[Callable[[], SessionScorer]] = []
    if args.scenario is not None:
        scorers.append(lambda: _lazy("offline.demo.oracle", "load_oracle")(args.scenario, data.item_ids))
    fits = {
        "pop": lambda: Popularity(counts),
        "spop": lambda: SessionPopularity(counts),
        "markov": lambda: Markov.fit(data.train, data.n_items),
        "item-knn": lambda: ItemKNN.fit(data.train, data.n_items, neighbours=neighbours, regulariser=regulariser),
        "session-knn": lambda: SessionKNN.fit(data.train, data.n_items, **sknn),
    }
    scorers += [fits[name] for name in names]
    scorers += [(lambda p=p: _lazy("offline.evaluate.gru_scorer", "load_torch_scorer")(p)) for p in args.checkpoint]
    scorers += [
        (lambda p=p, sc=sc: _lazy("offline.evaluate.onnx_scorer", "load_onnx_scorer")(p, scoring=sc)) for p in args.artifact for sc in args.scoring
    ]

    built: list[SessionScorer] = []
    for build in scorers:
        scorer = build()
        if scorer.n_items != data.n_items:
            raise ArtifactError(f"{scorer.name} scores {scorer.n_items} items but {args.data} has {data.n_items}")
        built.append(scorer)
    exclude_seen, seen_table = args.exclude_seen == "on", None
    if args.exclude_seen == "auto":
        started = time.perf_counter()
        exclude_seen, seen_table = choose_exclude_seen([s for s in built if s.name != "oracle"] or built, data.valid, counts, k_main)
        print(f"chose exclude-seen {'on' if exclude_seen else 'off'} on the validation split in {time.perf_counter() - started:.1f} s", file=sys.stderr)

    results: dict[str, Result] = {}
    by_name: dict[str, SessionScorer] = {}
    for scorer in built:
        started = time.perf_counter()
        result = evaluate(scorer, split, ks, popularity=counts, bootstrap=bootstrap, seed=seed, exclude_seen=exclude_seen)
        result.name = _unique(scorer.name, results)
        results[result.name] = result
        by_name[result.name] = scorer
        print(f"evaluated {result.name} in {time.perf_counter() - started:.1f} s", file=sys.stderr)

    costs = {}
    if cost_clicks:
        started = time.perf_counter()
        costs = click_costs(by_name, data, split, counts, cost_clicks, exclude_seen, neighbours, regulariser)
        print(f"timed {len(costs)} recommenders per click in {time.perf_counter() - started:.1f} s", file=sys.stderr)
    decision = build_decision(
        results, costs, budget_ms, bootstrap, seed,
        settings={
            "split": args.split,
            "catalogue_items": data.n_items,
            "exclude_seen": {"choice": args.exclude_seen, "value": exclude_seen, "validation_recall": seen_table},
            "session_knn": {**sknn, "tuned": bool(tuning), "trials": tuning} if "session-knn" in names else None,
        },
        training={name: validation_curve(p) for name, p in zip(_gru_names(results, args.checkpoint), args.checkpoint)},
    )  # fmt: skip

    first = next(iter(results.values()))
    print(f"{args.split} split: {first.n_sessions:,} sessions, {first.n_events:,} target clicks, {data.n_items:,} items")
    print(format_table(results))
    for line in verdict_lines(results):
        print(line)
    print(f"exclude-seen: {'on' if exclude_seen else 'off'} ({args.exclude_seen}) for every recommender")
    for name, cost in costs.items():
        print(f"cost per click, {name}: p50 {cost.p50_ms:.3f} ms, p99 {cost.p99_ms:.3f} ms ({cost.how}, {cost.clicks} clicks)")
    for line in decision["verdict"].get("lines", []):
        print(line)

    out = args.out if args.out is not None else Path(args.data) / f"evaluation-{args.split}.json"
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        report = {**results_json(results), "decision": decision, "provenance": provenance(args, data, ks, results, names, sknn, neighbours, regulariser, bootstrap, seed)}
        out.write_text(json.dumps(report, indent=2) + "\n", encoding="utf-8")
    except OSError as exc:
        raise EvaluateOptionError(f"--out {out}: cannot write the report ({exc.strerror or exc})") from exc
    print(f"wrote {out}")
    if args.report is not None:
        from offline.evaluate.report import write_report

        try:
            page = write_report(args.report, report)
        except OSError as exc:
            raise EvaluateOptionError(f"--report {args.report}: cannot write the report ({exc.strerror or exc})") from exc
        print(f"wrote {page}")
    return 0


def check_paths(args: argparse.Namespace) -> None:
    """Every file and folder named on the command line exists (one line naming the first that does not)."""
    if not Path(args.data).is_dir():
        raise EvaluateOptionError(f"--data {args.data}: no such folder (a prepared data set from `cairn prepare`)")
    for path in args.checkpoint:
        if not Path(path).is_file():
            raise EvaluateOptionError(f"--checkpoint {path}: no such file")
    for path in args.artifact:
        if not Path(path).is_dir():
            raise EvaluateOptionError(f"--artifact {path}: no such folder")
    if args.scenario is not None and not Path(args.scenario).is_file():
        raise EvaluateOptionError(f"--scenario {args.scenario}: no such file")


def provenance(
    args: argparse.Namespace, data: PreparedData, ks: tuple[int, ...], results: dict[str, Result], names: list[str],
    sknn: dict, neighbours: int, regulariser: float, bootstrap: int, seed: int,
) -> dict:  # fmt: skip
    """What the report is of: the data (and its fingerprint), split, cut-offs, each row's checkpoint or
    artifact, the baselines' settings, the seed and resamples, and the cairn that made it."""
    from datetime import datetime, timezone

    from service import __version__

    artifacts = [n for n in results if n.endswith("-onnx") or "-onnx-" in n]
    return {
        "data": {"path": str(args.data), "fingerprint": data.fingerprint()},
        "split": args.split,
        "sessions": _integer("--sessions", args.sessions, minimum=0) or None,  # a sample of this many; None: all
        "k": list(ks),
        "checkpoints": {name: str(path) for name, path in zip(_gru_names(results, args.checkpoint), args.checkpoint)},
        "artifacts": {name: str(path) for name, path in zip(artifacts, [p for p in args.artifact for _ in args.scoring])},
        "baselines": {
            "recommenders": names,
            "item_knn": {"neighbours": neighbours, "regulariser": regulariser},
            "session_knn": sknn if "session-knn" in names else None,
        },
        "scenario": None if args.scenario is None else str(args.scenario),
        "seed": seed,
        "bootstrap": bootstrap,
        "cairn_version": __version__,
        "created_at": datetime.now(timezone.utc).isoformat(timespec="seconds"),
    }


def _gru_names(results: dict[str, Result], checkpoints: list[Path]) -> list[str]:
    """Result names of the checkpoints, in order (they follow the oracle and the baselines)."""
    grus = [n for n in results if n.startswith("gru") and not n.endswith("-onnx") and "-onnx-" not in n]
    return grus[: len(checkpoints)]


def parse_ks(values: list[str]) -> tuple[int, ...]:
    """--k values, spaces or commas between them: positive integers, duplicates dropped, order kept."""
    ks: list[int] = []
    for value in (v for raw in values for v in str(raw).split(",")):
        k = _integer("--k", value, minimum=1)
        if k not in ks:
            ks.append(k)
    if not ks:
        raise EvaluateOptionError("--k needs at least one positive integer")
    return tuple(ks)


def parse_recommenders(value: str) -> list[str]:
    names: list[str] = []
    for name in (n.strip() for n in value.split(",")):
        if not name:
            continue
        if name not in BASELINES:
            raise EvaluateOptionError(f"--recommenders: unknown recommender {name!r} (known: {DEFAULT_RECOMMENDERS})")
        if name not in names:
            names.append(name)
    return names


def _scoring(text: str) -> str:
    """--scoring's type: a path name or clustered@N (argparse reports the ValueError's message as a usage error)."""
    try:
        parse_scoring(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from exc
    return text


def _integer(option: str, value: str, minimum: int) -> int:
    try:
        number = int(str(value).strip())
    except ValueError:
        number = None
    if number is None or number < minimum:
        kind = "a positive integer" if minimum == 1 else f"an integer >= {minimum}"
        raise EvaluateOptionError(f"{option} must be {kind}, got {value!r}")
    return number


def _number(option: str, value: str, minimum: float) -> float:
    try:
        number = float(str(value).strip())
    except ValueError:
        number = float("nan")
    if not number >= minimum or number == float("inf"):  # also refuses nan
        raise EvaluateOptionError(f"{option} must be a number >= {minimum:g}, got {value!r}")
    return number


def _unique(name: str, taken: dict[str, Result]) -> str:
    """Two GRUs with one loss (a checkpoint and its export, say) get -2, -3, ... so neither is lost."""
    if name not in taken:
        return name
    n = 2
    while f"{name}-{n}" in taken:
        n += 1
    return f"{name}-{n}"


def _lazy(module: str, function: str) -> Callable:
    # Imported only when asked for: the GRU scorers pull in torch or onnxruntime.
    try:
        return getattr(importlib.import_module(module), function)
    except ModuleNotFoundError as exc:
        if exc.name != module:
            raise
        raise EvaluateOptionError(f"{module} is not part of this installation; cannot use {function}") from exc
