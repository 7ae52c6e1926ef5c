"""Session-KNN as the service runs it: one visit at a time, numpy only, sparse.

The definition and the offline scorer are in offline/evaluate/session_knn.py; this is the same
computation for one visit, reading the index the artifact carries (`SessionIndex`): the candidates
are the union of the visit items' posting lists (each already cut to the M most recent sessions),
the M most recent of them are kept, their items are gathered once, and only the items of the k
nearest sessions are scored. The work follows the visit's length times M and the neighbours'
lengths, never the catalogue size.

Order of a list: summed similarity (rounded to 1e-9, so float noise does not split a tie), then
training popularity (the popularity recommender's order); equal session similarities prefer the
more recent session. The offline scorer uses the same rules, so both rank a visit alike.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from service.runtime.recommenders import PopularityRecommender, Ranking, without_seen

WEIGHTINGS = ("none", "linear")
_NO_SEEN: frozenset[int] = frozenset()


@dataclass(frozen=True)
class SessionIndex:
    """Training sessions as item sets, and the M most recent sessions of each item.

    session_items CSR over sessions: the distinct items of session j (ascending) are
        session_items[session_indptr[j]:session_indptr[j + 1]]
    item_sessions CSR over items: the at most M most recent sessions containing item i, most recent first
    """

    session_indptr: np.ndarray  # int64 [S + 1]
    session_items: np.ndarray  # int32 [nnz]
    item_indptr: np.ndarray  # int64 [n_items + 1]
    item_sessions: np.ndarray  # int32 [<= n_items * M]
    candidates: int  # M

    @property
    def n_sessions(self) -> int:
        return len(self.session_indptr) - 1

    @property
    def n_items(self) -> int:
        return len(self.item_indptr) - 1

    def arrays(self) -> dict[str, np.ndarray]:
        return {
            "session_indptr": self.session_indptr,
            "session_items": self.session_items,
            "item_indptr": self.item_indptr,
            "item_sessions": self.item_sessions,
        }


def visit_weights(clicks: np.ndarray | list[int], weighting: str) -> tuple[np.ndarray, np.ndarray]:
    """(distinct items ascending, weights) of a visit, clicks oldest first.

    "none": 1 for every item. "linear" (sequence-aware): the click at position p (1-based) of L
    weighs p / L; an item clicked more than once takes its latest weight.
    """
    clicks = np.asarray(clicks, dtype=np.int64)
    length = len(clicks)
    position_weight = np.ones(length) if weighting == "none" else np.arange(1, length + 1) / max(length, 1)
    items, first_in_reversed = np.unique(clicks[::-1], return_index=True)  # the latest click of each item
    return items, position_weight[::-1][first_in_reversed]


def _ranges(starts: np.ndarray, lengths: np.ndarray) -> np.ndarray:
    """Concatenated aranges [starts[i], starts[i] + lengths[i]) without a Python loop."""
    total = int(lengths.sum())
    if total == 0:
        return np.zeros(0, dtype=np.int64)
    return np.repeat(starts - np.cumsum(lengths) + lengths, lengths) + np.arange(total)


class SessionKnnRecommender:
    """Served session-KNN. State: None (the visit's clicks come from the session state each call)."""

    name = "session-knn"

    def __init__(self, index: SessionIndex, popularity: PopularityRecommender, neighbours: int, weighting: str) -> None:
        if neighbours < 1 or weighting not in WEIGHTINGS:
            raise ValueError(f"session-knn needs neighbours >= 1 and a weighting of {WEIGHTINGS}, got {neighbours}, {weighting!r}")
        self.index = index
        self.popularity = popularity
        self.neighbours = int(neighbours)
        self.weighting = weighting
        self.n_items = index.n_items
        self._session_length = np.diff(index.session_indptr)  # [S] distinct items per session
        rank = np.empty(len(popularity.order), dtype=np.int64)
        rank[np.asarray(popularity.order, dtype=np.int64)] = np.arange(len(popularity.order))
        self._popularity_rank = rank  # [n_items], 0 = most clicked

    def recommend(self, visit: list[int], count: int, seen: frozenset[int] = _NO_SEEN) -> Ranking:
        """The next-click list after `visit` (item indices, oldest first); popular items fill it up."""
        if not visit:
            return self.popularity.top(count, seen)
        items, weights = self.scores(visit)
        want = count + len(seen)
        if len(items) > want:
            # only the want best scores and their ties are ordered: partition first
            kth = -np.partition(-weights, want - 1)[want - 1]
            cut = weights >= kth - 1e-9
            items, weights = items[cut], weights[cut]
        order = np.lexsort((self._popularity_rank[items], -np.round(weights, 9)))
        ranked = without_seen(items[order].tolist(), weights[order].tolist(), seen, count)
        missing = count - len(ranked.items)
        if missing <= 0:
            return ranked
        filler = self.popularity.top(missing, seen | set(ranked.items))
        return Ranking(ranked.items + filler.items, ranked.scores + [0.0] * len(filler.items))

    def scores(self, visit: list[int]) -> tuple[np.ndarray, np.ndarray]:
        """(items, summed similarity) of every item some neighbour session contains."""
        ix = self.index
        items, weights = visit_weights(visit, self.weighting)
        starts = ix.item_indptr[items]
        postings = ix.item_sessions[_ranges(starts, ix.item_indptr[items + 1] - starts)]
        candidates = np.unique(postings)[-ix.candidates :]  # the M most recent (largest index)
        if len(candidates) == 0:
            return np.zeros(0, dtype=np.int64), np.zeros(0)
        lengths = self._session_length[candidates]
        flat = ix.session_items[_ranges(ix.session_indptr[candidates], lengths)]  # items of every candidate
        owner = np.repeat(np.arange(len(candidates)), lengths)
        where = np.minimum(np.searchsorted(items, flat), len(items) - 1)
        contribution = np.where(items[where] == flat, weights[where], 0.0)
        dots = np.bincount(owner, contribution, minlength=len(candidates))
        sims = dots / (np.sqrt(np.dot(weights, weights)) * np.sqrt(lengths))
        top = np.lexsort((-candidates, -sims))[: self.neighbours]  # most similar; equal: most recent
        chosen = np.zeros(len(candidates), dtype=bool)
        chosen[top] = True
        keep = chosen[owner]
        scored, inverse = np.unique(flat[keep], return_inverse=True)
        return scored, np.bincount(inverse, sims[owner[keep]], minlength=len(scored))
