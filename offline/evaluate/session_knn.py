"""Session-KNN ("session-knn"): the visit against past training sessions, as item sets.

The published definition (Jannach and Ludewig, RecSys 2017, "When recurrent neural networks meet
the neighborhood for session-based recommendation"):

    candidates  the M most recent training sessions that share at least one item with the visit
    sim(s, n)   cosine similarity of the visit s and the session n as binary item vectors,
                |s & n| / sqrt(|s| * |n|)
    neighbours  the k candidates most similar to the visit
    score(i)    the summed similarity of the neighbours that contain item i

The sequence-aware variant (`weighting="linear"`; Ludewig and Jannach 2018, "Evaluation of
session-based recommendation algorithms", V-SKNN) weighs the visit's items by how recent they are:
the click at position p (1-based) of a visit of length L weighs p / L, an item clicked more than
once takes its latest weight, and the similarity is the cosine of that weighted visit vector with
the binary session vector (with weight 1 everywhere it is the plain definition above).

"Most recent" is the session order of the prepared split (sessions sorted by start time). Keeping
for each item only the M most recent sessions that contain it gives exactly the same candidates
(the M most recent sessions of a union of sets each lie among the M most recent of one of them),
and bounds the work per click by the visit's length times M, whatever the catalogue.

Ties: items are ordered by summed similarity, then training popularity; equal similarities of two
sessions are resolved in favour of the more recent one.
"""

from __future__ import annotations

import numpy as np
from scipy import sparse

from offline.data.dataset import SessionSplit
from offline.evaluate.baselines import click_counts, popularity_tiebreak
from service.runtime.session_knn import WEIGHTINGS, SessionIndex, visit_weights  # noqa: F401 (shared with the service)

# Published defaults recalled as k = 100 neighbours from M = 500 candidates (from memory).
DEFAULT_NEIGHBOURS = 100
DEFAULT_CANDIDATES = 500
DEFAULT_WEIGHTING = "linear"


def session_index(split: SessionSplit, n_items: int, candidates: int) -> SessionIndex:
    """Distinct items per training session, and the `candidates` most recent sessions per item."""
    if candidates < 1:
        raise ValueError(f"candidates (M) must be a positive integer, got {candidates}")
    x = occurrence_matrix(split, n_items)  # CSR [S, n_items], binary, sorted indices
    xt = x.T.tocsr()  # [n_items, S], sessions ascending per item
    xt.sort_indices()
    lengths = np.diff(xt.indptr)
    keep_len = np.minimum(lengths, candidates)
    item_indptr = np.concatenate([[0], np.cumsum(keep_len)]).astype(np.int64)
    # For each item, its last `keep_len` entries (the most recent sessions), reversed: most recent first.
    row = np.repeat(np.arange(n_items), keep_len)
    offset_in_row = np.arange(int(item_indptr[-1])) - item_indptr[row]
    source = xt.indptr[row + 1] - 1 - offset_in_row
    return SessionIndex(
        session_indptr=x.indptr.astype(np.int64),
        session_items=x.indices.astype(np.int32),
        item_indptr=item_indptr,
        item_sessions=xt.indices[source].astype(np.int32),
        candidates=int(candidates),
    )


def occurrence_matrix(split: SessionSplit, n_items: int) -> sparse.csr_matrix:
    """Binary CSR [sessions, n_items]: 1 where the session clicked the item at least once."""
    session_of_click = np.repeat(np.arange(split.n_sessions), split.lengths())
    x = sparse.csr_matrix(
        (np.ones(split.n_clicks, dtype=np.float64), (session_of_click, split.items)), shape=(split.n_sessions, n_items)
    )
    x.sum_duplicates()
    x.data[:] = 1.0
    x.sort_indices()
    return x


class SessionKNN:
    """The offline scorer: many visits side by side, one sparse product per click (see the module docstring)."""

    name = "session-knn"

    def __init__(
        self,
        index: SessionIndex,
        counts: np.ndarray,
        neighbours: int = DEFAULT_NEIGHBOURS,
        weighting: str = DEFAULT_WEIGHTING,
    ) -> None:
        if neighbours < 1:
            raise ValueError(f"neighbours (k) must be a positive integer, got {neighbours}")
        if weighting not in WEIGHTINGS:
            raise ValueError(f"weighting must be one of {', '.join(WEIGHTINGS)}, got {weighting!r}")
        self.index = index
        self.neighbours = int(neighbours)
        self.weighting = weighting
        self.counts = np.asarray(counts, dtype=np.int64)
        self.n_items = len(self.counts)
        self._tiebreak = popularity_tiebreak(self.counts)  # [n_items]
        ptr = index.session_indptr
        self._x = sparse.csr_matrix(
            (np.ones(len(index.session_items), dtype=np.float64), index.session_items, ptr), shape=(index.n_sessions, self.n_items)
        )
        self._session_norm = np.sqrt(np.diff(ptr).astype(np.float64))  # sqrt(|n|)
        self._xt = sparse.csr_matrix(
            (np.ones(len(index.item_sessions)), index.item_sessions, index.item_indptr), shape=(self.n_items, index.n_sessions)
        )  # truncated postings
        self._history = np.zeros((0, 0), dtype=np.int64)
        self._out = np.empty((0, self.n_items), dtype=np.float32)
        # Rows whose scores the caller will read (the evaluator sets it before each click; the
        # others are left at the popularity order): None scores every row.
        self.needed: np.ndarray | None = None

    @classmethod
    def fit(
        cls,
        split: SessionSplit,
        n_items: int,
        neighbours: int = DEFAULT_NEIGHBOURS,
        candidates: int = DEFAULT_CANDIDATES,
        weighting: str = DEFAULT_WEIGHTING,
    ) -> "SessionKNN":
        return cls(session_index(split, n_items, candidates), click_counts(split, n_items), neighbours, weighting)

    @property
    def params(self) -> dict:
        return {"neighbours": self.neighbours, "candidates": self.index.candidates, "weighting": self.weighting}

    def begin(self, n_sessions: int) -> None:
        self.needed = None  # a mask of the previous batch does not fit this one
        self._history = np.zeros((n_sessions, 0), dtype=np.int64)
        self._out = np.empty((n_sessions, self.n_items), dtype=np.float32)

    def advance(self, items: np.ndarray) -> np.ndarray:
        self._history = np.concatenate([self._history, np.asarray(items, dtype=np.int64)[:, None]], axis=1)  # [n, t]
        needed = np.arange(len(items)) if self.needed is None else np.flatnonzero(self.needed)
        rows, cols, values = self.neighbour_scores(self._history[needed])
        rows = needed[rows]
        out = self._out
        out[:] = self._tiebreak
        if len(rows):
            # Order within each row by (summed similarity, popularity), encoded as 1 + (P - place) / P:
            # exact in float32 and above every unscored item's tiebreak in [0, 1).
            order = np.lexsort((-self._tiebreak[cols], -np.round(values, 9), rows))
            rows, cols = rows[order], cols[order]
            place = np.arange(len(rows)) - np.searchsorted(rows, rows)
            width = int(place.max()) + 1
            out[rows, cols] = (1.0 + (width - place) / width).astype(np.float32)
        return out

    def visit_matrix(self, history: np.ndarray) -> sparse.csr_matrix:
        """CSR [n, n_items] of the visits' item weights; history int64 [n, t], oldest click first."""
        n, t = history.shape
        rows = np.repeat(np.arange(n), t)
        items = history.ravel()
        position_weight = np.ones(t) if self.weighting == "none" else np.arange(1, t + 1) / t
        weights = np.tile(position_weight, n)
        keys = rows * self.n_items + items
        order = np.lexsort((-weights, keys))  # per (row, item): the latest click first
        keys, weights = keys[order], weights[order]
        first = np.ones(len(keys), dtype=bool)
        first[1:] = keys[1:] != keys[:-1]
        r, i = np.divmod(keys[first], self.n_items)
        return sparse.csr_matrix((weights[first], (r, i)), shape=(n, self.n_items))

    def similarities(self, history: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The k neighbours of each visit: (row, session, similarity), by row then similarity descending."""
        v = self.visit_matrix(history)  # [n, n_items]
        # Candidates: sessions in the truncated postings of the visit's items, the M most recent per row.
        reach = (v.astype(bool).astype(np.float64) @ self._xt).tocsr()  # [n, S], > 0 where a session shares an item
        reach.sort_indices()  # sessions ascending within each row: the M most recent are the row's last M
        lengths = np.diff(reach.indptr)
        take = np.minimum(lengths, self.index.candidates)
        rows = np.repeat(np.arange(v.shape[0]), take)
        starts = np.repeat(reach.indptr[1:] - take, take)
        offsets = np.arange(len(rows)) - np.repeat(np.cumsum(take) - take, take)
        sessions = reach.indices[starts + offsets].astype(np.int64)
        if not len(rows):
            return rows, sessions, np.zeros(0)
        dots = np.asarray(self._x[sessions].multiply(v[rows]).sum(axis=1)).ravel()  # [P]
        visit_norm = np.sqrt(np.asarray(v.multiply(v).sum(axis=1)).ravel())  # [n]
        sims = dots / (visit_norm[rows] * self._session_norm[sessions])
        order = np.lexsort((-sessions, -sims, rows))  # most similar first; equal: most recent first
        rows, sessions, sims = rows[order], sessions[order], sims[order]
        place = np.arange(len(rows)) - np.searchsorted(rows, rows)
        keep = place < self.neighbours
        return rows[keep], sessions[keep], sims[keep]

    def neighbour_scores(self, history: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(row, item, summed similarity) of every item some neighbour of the row's visit contains."""
        rows, sessions, sims = self.similarities(history)
        w = sparse.csr_matrix((sims, (rows, sessions)), shape=(history.shape[0], self.index.n_sessions))
        scores = (w @ self._x).tocoo()  # [n, n_items]
        return scores.row.astype(np.int64), scores.col.astype(np.int64), scores.data
