"""The demo click log: visits placed in time (daily and hourly traffic), written as CSV files."""

from __future__ import annotations

from dataclasses import asdict, dataclass
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from service.errors import ScenarioError
from offline.demo.catalogue import Catalogue, build_catalogue
from offline.demo.params import CATALOGUE_FILE, CLICKS_FILE, DAY_S, HOURLY_TRAFFIC, MAX_THINK_S, SCENARIO_FILE, ScenarioParams
from offline.demo.products import CATEGORIES
from offline.demo.scenario import Scenario, build_scenario, simulate

# --- the demo log ------------------------------------------------------------------------------


@dataclass(frozen=True)
class DemoLog:
    catalogue: Catalogue
    scenario: Scenario
    cat_weights: np.ndarray  # float64 [K, n_categories]
    items: np.ndarray  # int32 [n_clicks], session order, time order within a session
    offsets: np.ndarray  # int64 [n_sessions + 1]
    times: np.ndarray  # int64 [n_clicks], epoch seconds
    session_ids: np.ndarray  # int64 [n_sessions], numbered by start time from 1
    visitors: np.ndarray  # int64 [n_sessions]

    @property
    def n_sessions(self) -> int:
        return len(self.offsets) - 1

    @property
    def n_clicks(self) -> int:
        return len(self.items)


def _visits(params: ScenarioParams, n_sessions: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Visitor and day of each session: a visitor's visits fall on consecutive distinct days."""
    mean_extra = params.sessions_per_visitor - 1
    per_visitor: list[np.ndarray] = []
    total = 0
    while total < n_sessions:
        # visits per visitor: 1 + geometric extra visits with the requested mean, at most one a day
        batch = max(1024, int((n_sessions - total) / params.sessions_per_visitor) + 1)
        extra = rng.geometric(1 / (1 + mean_extra), batch) - 1 if mean_extra > 0 else np.zeros(batch, np.int64)
        k = np.minimum(1 + extra, params.days)
        per_visitor.append(k)
        total += int(k.sum())
    counts = np.concatenate(per_visitor)
    counts = counts[: int(np.searchsorted(np.cumsum(counts), n_sessions)) + 1]
    counts[-1] -= int(counts.sum()) - n_sessions
    visitor = np.repeat(np.arange(len(counts)), counts)
    nth = np.arange(n_sessions) - np.repeat(np.cumsum(counts) - counts, counts)  # visit number 0..k-1
    day0 = rng.integers(0, params.days, len(counts))
    day = (np.repeat(day0, counts) + nth) % params.days
    # Shuffle which visitor owns which session slot: session order carries no meaning.
    perm = rng.permutation(n_sessions)
    return visitor[perm], day[perm]


def generate(params: ScenarioParams) -> DemoLog:
    params.validate()
    rng = np.random.default_rng(params.seed)
    catalogue = build_catalogue(params, rng)
    scenario, cat_weights = build_scenario(params, rng, catalogue)
    n_sessions = params.n_sessions
    lengths = rng.geometric(params.stop_prob, n_sessions).astype(np.int64)
    items = simulate(scenario, lengths, rng)
    offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)

    visitors, day = _visits(params, n_sessions, rng)
    hourly = np.array(HOURLY_TRAFFIC)
    hour = rng.choice(24, size=n_sessions, p=hourly / hourly.sum())
    start = params.start_epoch() + day * DAY_S + hour * 3600 + rng.integers(0, 3600, n_sessions)  # [S]
    think = np.exp(np.log(params.think_time_median) + params.think_time_spread * rng.standard_normal(len(items)))
    gaps = np.clip(np.ceil(think), 1, MAX_THINK_S).astype(np.int64)  # [n_clicks], >= 1 s: strict order
    gaps[offsets[:-1]] = 0  # a session's first click is at its start
    elapsed = np.cumsum(gaps)
    elapsed -= np.repeat(elapsed[offsets[:-1]], lengths)  # cumulative within each session
    # A visit that would run past midnight starts earlier instead: no session straddles two days,
    # so the ingest's day-based split never cuts one and the log ends on its last configured day.
    day_end = params.start_epoch() + (day + 1) * DAY_S - 1
    overrun = np.maximum(0, start + elapsed[offsets[1:] - 1] - day_end)
    start = np.maximum(start - overrun, day_end + 1 - DAY_S)
    times = np.repeat(start, lengths) + elapsed

    session_ids = np.empty(n_sessions, dtype=np.int64)
    session_ids[np.argsort(start, kind="stable")] = np.arange(1, n_sessions + 1)
    return DemoLog(catalogue, scenario, cat_weights, items, offsets, times, session_ids, visitors)


def write_demo(log: DemoLog, out: Path, params: ScenarioParams) -> None:
    """clicks.csv (rows in time order, as a shop's log would be), catalogue.csv, scenario.npz."""
    import polars as pl  # offline-only dependency, imported where it is used

    out = Path(out)
    if out.exists() and not out.is_dir():
        raise ScenarioError(f"out={str(out)!r}: exists and is not a folder")
    out.mkdir(parents=True, exist_ok=True)
    lengths = np.diff(log.offsets)
    order = np.argsort(log.times, kind="stable")  # a session's clicks stay in order (strictly later)
    session_of = np.repeat(np.arange(log.n_sessions), lengths)[order]
    width = max(7, len(str(int(log.visitors.max(initial=0)))))
    ids = pl.Series("item_id", log.catalogue.item_ids, dtype=pl.String)
    clicks = pl.DataFrame(
        {
            "session_id": log.session_ids[session_of],
            "visitor": log.visitors[session_of],
            "item_id": ids.gather(log.items[order]),
            "timestamp": log.times[order],
        }
    ).select(
        "session_id",
        pl.concat_str(pl.lit("v"), pl.col("visitor").cast(pl.String).str.zfill(width)).alias("visitor_id"),
        "item_id",
        "timestamp",
    )
    clicks.write_csv(out / CLICKS_FILE)
    pl.DataFrame(
        {
            "item_id": log.catalogue.item_ids,
            "name": log.catalogue.names,
            "category": [CATEGORIES[c] for c in log.catalogue.categories],
        }
    ).write_csv(out / CATALOGUE_FILE)
    log.scenario.save(
        out / SCENARIO_FILE,
        extra={
            "categories": np.array(CATEGORIES),
            "item_categories": log.catalogue.categories,
            "intent_category_weights": log.cat_weights,
            "item_popularity": log.catalogue.popularity,
            "stop_prob": np.array(params.stop_prob),
        },
        params=asdict(params),
    )


def summary(log: DemoLog, params: ScenarioParams) -> str:
    lengths = np.diff(log.offsets)
    first = datetime.fromtimestamp(int(log.times.min()), tz=timezone.utc).strftime("%Y-%m-%d")
    last = datetime.fromtimestamp(int(log.times.max()), tz=timezone.utc).strftime("%Y-%m-%d")
    single = int((lengths == 1).sum())
    return (
        f"Garden-shop demo: {log.n_sessions:,} sessions with {log.n_clicks:,} clicks "
        f"(mean length {lengths.mean():.2f}; {single:,} single-click sessions, which the ingest drops, "
        f"leave a mean of {lengths[lengths > 1].mean() if (lengths > 1).any() else 0:.2f}) "
        f"over {params.days} days from {first} to {last}, {log.catalogue.n_items:,} items in "
        f"{len(CATEGORIES)} categories, {params.intents} shopping intents, seed {params.seed}."
    )

