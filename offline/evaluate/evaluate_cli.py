"""`cairn evaluate`: measure recommenders on held-out sessions and compare each GRU with the baselines.

Prints one table (rows: recommenders; columns: each metric with its 95% interval), then one verdict
line per GRU, and writes the same numbers as JSON (keyed by recommender name).
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
from offline.data.dataset import PreparedData
from offline.evaluate.evaluation import Result, evaluate, format_table, results_json, verdict_lines
from offline.evaluate.scorer import SessionScorer

BASELINES = ("pop", "spop", "markov", "item-knn")
DEFAULT_RECOMMENDERS = ",".join(BASELINES)



def configure(parser: argparse.ArgumentParser) -> None:
    # Numbers are read as text and checked in run(), so a bad value is one line naming it.
    parser.add_argument("--data", required=True, type=Path, metavar="DIR", help="prepared data set (from `cairn prepare`)")
    parser.add_argument("--split", choices=("test", "valid"), default="test", help="sessions to evaluate on (default test)")
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
    parser.add_argument("--knn-neighbours", default="100", metavar="N", help="neighbours kept per item by item-knn (default 100)")
    parser.add_argument("--knn-regulariser", default="20", metavar="L", help="item-knn support regulariser lambda (default 20)")
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
    if not names and not args.scenario and not args.checkpoint and not args.artifact:
        raise EvaluateOptionError("nothing to evaluate: give --recommenders, --scenario, --checkpoint or --artifact")

    data = PreparedData.load(args.data)
    split = data.split(args.split)
    counts = click_counts(data.train, data.n_items)

    scorers: list[Callable[[], SessionScorer]] = []
    if args.scenario is not None:
        scorers.append(lambda: _lazy("offline.demo.oracle", "load_oracle")(args.scenario, data.item_ids))
    fits = {
        "pop": lambda: Popularity(counts),
        "spop": lambda: SessionPopularity(counts),
        "markov": lambda: Markov.fit(data.train, data.n_items),
        "item-knn": lambda: ItemKNN.fit(data.train, data.n_items, neighbours=neighbours, regulariser=regulariser),
    }
    scorers += [fits[name] for name in names]
    scorers += [(lambda p=p: _lazy("offline.evaluate.gru_scorer", "load_torch_scorer")(p)) for p in args.checkpoint]
    scorers += [(lambda p=p: _lazy("offline.evaluate.onnx_scorer", "load_onnx_scorer")(p)) for p in args.artifact]

    results: dict[str, Result] = {}
    for build in scorers:
        started = time.perf_counter()
        scorer = build()
        if scorer.n_items != data.n_items:
            raise ArtifactError(f"{scorer.name} scores {scorer.n_items} items but {args.data} has {data.n_items}")
        result = evaluate(scorer, split, ks, popularity=counts, bootstrap=bootstrap, seed=seed)
        result.name = _unique(scorer.name, results)
        results[result.name] = result
        print(f"evaluated {result.name} in {time.perf_counter() - started:.1f} s", file=sys.stderr)

    first = next(iter(results.values()))
    print(f"{args.split} split: {first.n_sessions} sessions, {first.n_events} target clicks, {data.n_items} items")
    print(format_table(results))
    for line in verdict_lines(results):
        print(line)

    out = args.out if args.out is not None else Path(args.data) / f"evaluation-{args.split}.json"
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        out.write_text(json.dumps(results_json(results), indent=2) + "\n", encoding="utf-8")
    except OSError as exc:
        raise EvaluateOptionError(f"--out {out}: cannot write the report ({exc.strerror or exc})") from exc
    print(f"wrote {out}")
    return 0


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
