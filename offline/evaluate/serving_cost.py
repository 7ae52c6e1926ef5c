"""What one click costs each recommender as the service runs it: in-process, batch 1, this catalogue.

Held-out visits are replayed click by click and every click is timed (perf_counter_ns) from the
click to the finished top-20 list. Recommenders the service runs are timed through the service's
own classes (popularity, the item-KNN neighbour table, session-KNN); the others (the GRU from a
checkpoint or an artifact, Markov, session popularity) through their offline scorer at batch 1
plus the top-20 selection, which is what a served GRU step computes (ONNX Runtime in the service).
The figures are from one run on this machine: compare them side by side, not across machines.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from offline.data.dataset import SessionSplit
from offline.evaluate.next_clicks import best_items
from offline.evaluate.scorer import SessionScorer

LIST_LENGTH = 20
WARM_UP_CLICKS = 20  # first clicks (caches, lazy set-up) are not counted


@dataclass(frozen=True)
class ClickCost:
    p50_ms: float
    p99_ms: float
    clicks: int
    how: str  # "service" (the service's class) or "scorer" (the offline scorer at batch 1)

    def to_json(self) -> dict:
        return {"p50_ms": self.p50_ms, "p99_ms": self.p99_ms, "clicks": self.clicks, "how": self.how}


# A visit replay: called with the visit's clicks so far (item indices, oldest first) after each click.
Clicker = Callable[[list[int]], object]


def scorer_clicker(scorer: SessionScorer) -> tuple[Callable[[], None], Clicker]:
    """(start of a visit, one click) for an offline scorer at batch 1 (a service would take the
    top 20 plus the visit's seen items and drop those: the same selection within a few items)."""

    def click(visit: list[int]) -> object:
        scores = scorer.advance(np.array([visit[-1]], dtype=np.int64))
        return best_items(scores, LIST_LENGTH + len(visit))

    return (lambda: scorer.begin(1)), click


def measure(start: Callable[[], None], click: Clicker, split: SessionSplit, clicks: int, how: str) -> ClickCost:
    """Time up to `clicks` clicks of the split's visits (in split order) after a short warm-up."""
    timings: list[int] = []
    goal = clicks + WARM_UP_CLICKS
    for s in range(split.n_sessions):
        visit: list[int] = []
        start()
        for item in split.session(s).tolist():
            visit.append(item)
            t0 = time.perf_counter_ns()
            click(visit)
            timings.append(time.perf_counter_ns() - t0)
        if len(timings) >= goal:
            break
    kept = np.asarray(timings[WARM_UP_CLICKS:goal] or timings, dtype=np.float64) / 1e6
    if not len(kept):
        return ClickCost(float("nan"), float("nan"), 0, how)
    p50, p99 = np.percentile(kept, [50, 99])
    return ClickCost(float(p50), float(p99), len(kept), how)


def served_clicker(recommend: Callable[[list[int], frozenset[int]], object], exclude_seen: bool, history: int = 20) -> tuple[Callable[[], None], Clicker]:
    """(start, click) for a service recommender called with the visit's recent clicks and seen set,
    as service/runtime/visits.py calls it (the session state keeps `history` recent clicks)."""

    def click(visit: list[int]) -> object:
        recent = visit[-(history + 1) :]
        seen = frozenset(recent) if exclude_seen else frozenset()
        return recommend(recent, seen)

    return (lambda: None), click


def click_costs(
    scorers: dict[str, SessionScorer],
    data,
    split: SessionSplit,
    counts: np.ndarray,
    clicks: int,
    exclude_seen: bool,
    item_knn_neighbours: int,
    item_knn_regulariser: float,
) -> dict[str, ClickCost]:
    """Cost per click of every evaluated recommender but the oracle (see the module docstring)."""
    # Imported here: the service's classes, which the evaluation itself does not need.
    from service.runtime.recommenders import NeighbourRecommender, PopularityRecommender
    from service.runtime.session_knn import SessionKnnRecommender

    from offline.evaluate.baselines import ItemKNN
    from offline.evaluate.session_knn import SessionKNN

    popularity = PopularityRecommender(np.asarray(counts, dtype=np.float32))
    out: dict[str, ClickCost] = {}
    for name, scorer in scorers.items():
        if name == "oracle":
            continue
        if name == "pop":
            start, click = served_clicker(lambda v, seen: popularity.top(LIST_LENGTH, seen), exclude_seen)
            how = "service"
        elif isinstance(scorer, ItemKNN):
            table = NeighbourRecommender(*scorer.neighbour_table(), popularity)
            start, click = served_clicker(lambda v, seen, t=table: t.neighbours_of(v[-1], LIST_LENGTH, seen), exclude_seen)
            how = "service"
        elif isinstance(scorer, SessionKNN):
            served = SessionKnnRecommender(scorer.index, popularity, scorer.neighbours, scorer.weighting)
            start, click = served_clicker(lambda v, seen, r=served: r.recommend(v, LIST_LENGTH, seen), exclude_seen)
            how = "service"
        else:
            start, click = scorer_clicker(scorer)
            how = "scorer"
        out[name] = measure(start, click, split, clicks, how)
    return out
