"""`cairn demo-data`: write the garden-shop demo log, its catalogue and its oracle's scenario."""

from __future__ import annotations

import argparse
from dataclasses import fields
from pathlib import Path

from offline.demo.demo_log import generate, summary, write_demo
from offline.demo.params import CATALOGUE_FILE, CLICKS_FILE, SCENARIO_FILE, ScenarioParams

# flag help per ScenarioParams field; every field is a flag named after it (underscores -> dashes)
_HELP = {
    "seed": "random seed; the same seed and flags give the same files",
    "sessions": "sessions before --scale",
    "scale": "multiplies the number of sessions (e.g. 30 for a ~10M-click benchmark log)",
    "items": "catalogue size",
    "intents": "latent shopping intents",
    "intent_persistence": "probability that the intent stays the same from one click to the next",
    "follow_prob": "probability that the next click follows a link of the last item (when it has links)",
    "reclick_prob": "probability that the next click returns to an earlier item of the session",
    "stop_prob": "probability that a session ends after each click (mean length 1/stop-prob)",
    "popularity_exponent": "Zipf exponent of item popularity within a category",
    "intent_taste": "log-normal spread of each intent's own liking of items (0: popularity only)",
    "intent_categories": "categories each intent favours",
    "background_share": "share of an intent's clicks drawn from shop-wide popularity",
    "followups_min": "fewest follow-up links per main product",
    "followups_max": "most follow-up links per main product",
    "main_share": "share of the catalogue that are main products (the rest are accessories and consumables)",
    "days": "days the log spans",
    "start_date": "first day, YYYY-MM-DD (UTC)",
    "think_time_median": "median seconds between two clicks",
    "think_time_spread": "log-normal sigma of the time between clicks",
    "sessions_per_visitor": "mean visits per visitor",
}


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--out", type=Path, required=True, help=f"folder for {CLICKS_FILE}, {CATALOGUE_FILE}, {SCENARIO_FILE}")
    for f in fields(ScenarioParams):
        parser.add_argument(
            "--" + f.name.replace("_", "-"),
            dest=f.name,
            type=type(f.default),
            default=f.default,
            help=f"{_HELP[f.name]} (default: {f.default})",
        )


def run(args: argparse.Namespace) -> int:
    params = ScenarioParams(**{f.name: getattr(args, f.name) for f in fields(ScenarioParams)})
    params.validate()
    log = generate(params)
    write_demo(log, args.out, params)
    print(summary(log, params) + f" Wrote {args.out / CLICKS_FILE}, {args.out / CATALOGUE_FILE} and {args.out / SCENARIO_FILE}.")
    return 0
