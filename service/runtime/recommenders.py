"""The three recommenders the service runs, behind one small protocol.

    start()                          the state of a visit with no clicks yet
    advance(state, item)             apply one click (replaying a visit into a new model)
    step(state, item, count, seen)   apply one click and rank the next click: the click path
    rank(state, count, seen)         rank the next click without a new one (the visit's current list)

Items are indices into the artifact's vocabulary; mapping ids to indices (and unknown ids) is the
caller's business. `seen` is a set of indices not to recommend; a ranker asks for
count + len(seen) candidates and drops the seen ones, so an answer still holds `count` items.
Whatever does not depend on the request (popularity order, neighbour rows) is prepared at load.
Answers are short Python lists: filtering a few dozen candidates against a set costs a tenth of
what NumPy's set routines cost at this size (measured: about 2 us against 20 us).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np

from service.runtime.batching import StepBatcher

_NO_SEEN: frozenset[int] = frozenset()


@dataclass(frozen=True)
class Ranking:
    items: list[int]  # best first, k <= count
    scores: list[float]
    step_s: float = 0.0  # GRU: seconds ONNX Runtime spent on the call that scored it (Server-Timing `step`)
    scoring: str = ""  # GRU: the scoring path, exact | fp16 | int8 | int4 | clustered (Server-Timing `scoring`)


class Recommender(Protocol):
    name: str  # what answers report as served_by

    def start(self) -> Any: ...

    async def advance(self, state: Any, item: int) -> Any: ...

    async def step(self, state: Any, item: int, count: int, seen: frozenset[int] = _NO_SEEN) -> tuple[Any, Ranking]: ...

    async def rank(self, state: Any, count: int, seen: frozenset[int] = _NO_SEEN) -> Ranking: ...


def without_seen(
    items: list[int], scores: list[float], seen: frozenset[int] | set[int], count: int, step_s: float = 0.0, scoring: str = ""
) -> Ranking:
    """The first `count` candidates that are not in `seen`, order kept."""
    if not seen:
        return Ranking(items[:count], scores[:count], step_s, scoring)
    kept_items: list[int] = []
    kept_scores: list[float] = []
    for item, score in zip(items, scores):
        if item not in seen:
            kept_items.append(item)
            kept_scores.append(score)
            if len(kept_items) == count:
                break
    return Ranking(kept_items, kept_scores, step_s, scoring)


class PopularityRecommender:
    """Most clicked items in training; the same list for every visit. State: None."""

    name = "popularity"

    def __init__(self, popularity: np.ndarray) -> None:
        order = np.argsort(-popularity, kind="stable")  # [n_items], most clicked first
        self.order: list[int] = order.tolist()
        self.order_scores: list[float] = popularity[order].astype(np.float32).tolist()
        self.n_items = len(popularity)

    def start(self) -> None:
        return None

    async def advance(self, state: None, item: int) -> None:
        return None

    async def step(self, state: None, item: int, count: int, seen: frozenset[int] = _NO_SEEN) -> tuple[None, Ranking]:
        return None, self.top(count, seen)

    async def rank(self, state: None, count: int, seen: frozenset[int] = _NO_SEEN) -> Ranking:
        return self.top(count, seen)

    def top(self, count: int, seen: frozenset[int] | set[int] = _NO_SEEN) -> Ranking:
        """Top `count` by popularity, leaving out `seen`."""
        n = min(self.n_items, count + len(seen))
        return without_seen(self.order[:n], self.order_scores[:n], seen, count)


class NeighbourRecommender:
    """Item-KNN table: the neighbours of the visit's last known click. State: that item's index, -1 before any.

    A row holds K neighbours; when fewer than `count` remain after dropping seen items, the answer is
    topped up with popular items at score 0 (a similarity the table does not record).
    """

    name = "neighbours"

    def __init__(self, neighbour_items: np.ndarray, neighbour_scores: np.ndarray, popularity: PopularityRecommender) -> None:
        valid = neighbour_items >= 0  # [n_items, K]; -1 pads rows with fewer neighbours
        self.row_length = valid.sum(axis=1).astype(np.int64)  # [n_items]
        # Pads sit at the end of each row (the artifact's convention); rows are sliced, never masked.
        self.rows = neighbour_items.astype(np.int64)  # [n_items, K]
        self.row_scores = neighbour_scores.astype(np.float32)  # [n_items, K]
        self.popularity = popularity

    def start(self) -> int:
        return -1

    async def advance(self, state: int, item: int) -> int:
        return item

    async def step(self, state: int, item: int, count: int, seen: frozenset[int] = _NO_SEEN) -> tuple[int, Ranking]:
        return item, self.neighbours_of(item, count, seen)

    async def rank(self, state: int, count: int, seen: frozenset[int] = _NO_SEEN) -> Ranking:
        if state < 0:
            return self.popularity.top(count, seen)
        return self.neighbours_of(state, count, seen)

    def neighbours_of(self, item: int, count: int, seen: frozenset[int] = _NO_SEEN) -> Ranking:
        n = self.row_length[item]
        ranked = without_seen(self.rows[item, :n].tolist(), self.row_scores[item, :n].tolist(), seen, count)
        missing = count - len(ranked.items)
        if missing <= 0:
            return ranked
        filler = self.popularity.top(missing, seen | set(ranked.items))
        return Ranking(ranked.items + filler.items, ranked.scores + [0.0] * len(filler.items))


@dataclass(frozen=True)
class GruState:
    hidden: np.ndarray  # float32 [L, H] after the last click
    previous: np.ndarray | None  # float32 [L, H] before the last click, None before any click
    last_item: int  # index of the last click, -1 before any


class GruRecommender:
    """The GRU next-click model on ONNX Runtime, every step through the shared batcher."""

    name = "gru"

    def __init__(self, batcher: StepBatcher) -> None:
        self.batcher = batcher
        self.layers, self.hidden_size, self.n_items = batcher.layers, batcher.hidden_size, batcher.n_items
        self.scoring: str = getattr(batcher.step, "scoring", "exact")
        self._zero = np.zeros((self.layers, self.hidden_size), dtype=np.float32)  # [L, H]
        self._zero.setflags(write=False)

    def start(self) -> GruState:
        return GruState(self._zero, None, -1)

    async def advance(self, state: GruState, item: int) -> GruState:
        next_hidden, _, _ = await self.batcher.run(item, state.hidden, 1)
        return GruState(next_hidden, state.hidden, item)

    async def step(self, state: GruState, item: int, count: int, seen: frozenset[int] = _NO_SEEN) -> tuple[GruState, Ranking]:
        top_n = min(self.n_items, count + len(seen))
        next_hidden, items, scores, step_s, scoring = await self.batcher.run_timed(item, state.hidden, top_n)  # [L, H], [top_n], [top_n]
        return GruState(next_hidden, state.hidden, item), without_seen(items.tolist(), scores.tolist(), seen, count, step_s, scoring)

    async def rank(self, state: GruState, count: int, seen: frozenset[int] = _NO_SEEN) -> Ranking:
        # The list after the last click is that click's step again, from the state before it.
        if state.previous is None or state.last_item < 0:
            raise ValueError("a GRU state before any click has no ranking; answer from popularity")
        _, ranking = await self.step(GruState(state.previous, None, -1), state.last_item, count, seen)
        return ranking

    def hidden_from_bytes(self, raw: bytes | None) -> np.ndarray | None:
        """A stored hidden state, or None when it is missing or of another shape."""
        if raw is None or len(raw) != self._zero.nbytes:
            return None
        return np.frombuffer(raw, dtype=np.float32).reshape(self.layers, self.hidden_size)  # [L, H]
