"""The simple recommenders every GRU result is measured against, each a `SessionScorer`.

- `Popularity` ("pop"): training click counts, the same list for everyone.
- `SessionPopularity` ("spop"): items already clicked in this session first (by count in the
  session), then popularity.
- `Markov` ("markov"): first-order transitions, how often each item directly followed the last
  click in a training session. Simple sequential models of this kind are often as strong as neural
  ones in published re-evaluations (Ludewig and Jannach, 2018).
- `ItemKNN` ("item-knn"): the item-to-item neighbour baseline of Hidasi et al. (ICLR 2016).

Ties: the evaluator ranks a target by the number of items scored strictly higher, so equal scores
flatter a model. Every scorer therefore adds `popularity_tiebreak`, a value in [0, 1) that orders
items by training clicks and is distinct for every item, below the smallest step of its own score.

Every `advance` writes into a buffer prepared by `begin` and returns it: the scores are valid
until the next `advance` (the evaluator consumes them at once).
"""

from __future__ import annotations

import numpy as np
from scipy import sparse

from service.errors import InputDataError
from offline.data.dataset import SessionSplit

# Upper bound on the co-occurrence entries ItemKNN handles at once (memory: ~40 bytes each).
_KNN_BLOCK_ENTRIES = 1 << 22


def click_counts(split: SessionSplit, n_items: int) -> np.ndarray:
    """Training clicks per item, int64 [n_items]; refuses item indices outside the catalogue."""
    _check_items(split, n_items)
    return np.bincount(split.items, minlength=n_items).astype(np.int64)


def popularity_tiebreak(counts: np.ndarray) -> np.ndarray:
    """float32 [n_items] in [0, 1): rank of each item by clicks (equal clicks: lower index first).

    Values are k / n_items, so they stay distinct in float32 next to scores up to about a hundred.
    """
    n = len(counts)
    order = np.lexsort((-np.arange(n), counts))  # ascending by clicks, lower index last among equals
    tiebreak = np.empty(n, dtype=np.float64)
    tiebreak[order] = np.arange(n) / max(n, 1)
    return tiebreak.astype(np.float32)


class Popularity:
    """The most clicked items of the training split, the same list for every session."""

    name = "pop"

    def __init__(self, counts: np.ndarray) -> None:
        self.counts = np.asarray(counts, dtype=np.int64)  # [n_items] training clicks
        self.n_items = len(self.counts)
        # The tiebreak alone is the click-count order with ties resolved, so it is the score.
        self._scores = popularity_tiebreak(self.counts)  # [n_items]
        self._out = np.empty((0, self.n_items), dtype=np.float32)

    @classmethod
    def fit(cls, split: SessionSplit, n_items: int) -> "Popularity":
        return cls(click_counts(split, n_items))

    def begin(self, n_sessions: int) -> None:
        # The list never changes, so it is written once per batch, not once per click.
        self._out = np.tile(self._scores, (n_sessions, 1))  # [n, n_items]

    def advance(self, items: np.ndarray) -> np.ndarray:
        return self._out


class SessionPopularity:
    """Items of this session first, by how often the session clicked them; then popularity.

    score(j) = clicks on j in this session so far + tiebreak(j), tiebreak in [0, 1).
    """

    name = "spop"

    def __init__(self, counts: np.ndarray) -> None:
        self.counts = np.asarray(counts, dtype=np.int64)
        self.n_items = len(self.counts)
        self._tiebreak = popularity_tiebreak(self.counts)  # [n_items]
        self._out = np.empty((0, self.n_items), dtype=np.float32)
        self._rows = np.arange(0)

    @classmethod
    def fit(cls, split: SessionSplit, n_items: int) -> "SessionPopularity":
        return cls(click_counts(split, n_items))

    def begin(self, n_sessions: int) -> None:
        self._out = np.tile(self._tiebreak, (n_sessions, 1))  # [n, n_items]
        self._rows = np.arange(n_sessions)

    def advance(self, items: np.ndarray) -> np.ndarray:
        # The scores are the running session counts plus the fixed tiebreak: one click adds 1 to one
        # entry per row, O(n) per click instead of rewriting [n, n_items].
        self._out[self._rows, items] += 1.0
        return self._out


class Markov:
    """First-order transitions: score(j | last click i) = times j directly followed i in training.

    Counted in click order only (i -> j adds to row i, column j, never the reverse), within
    sessions only (the last click of one session is not followed by the first of the next).
    Repeated clicks (i -> i) count: repeats are targets in the evaluation too.
    """

    name = "markov"

    def __init__(self, transitions: sparse.csr_matrix, counts: np.ndarray) -> None:
        self.transitions = transitions.astype(np.float32).tocsr()  # [n_items, n_items]
        self.counts = np.asarray(counts, dtype=np.int64)
        self.n_items = len(self.counts)
        self._tiebreak = popularity_tiebreak(self.counts)  # [n_items]
        self._out = np.empty((0, self.n_items), dtype=np.float32)

    @classmethod
    def fit(cls, split: SessionSplit, n_items: int) -> "Markov":
        counts = click_counts(split, n_items)
        follows = np.ones(max(split.n_clicks - 1, 0), dtype=bool)  # position p -> p + 1 in one session
        last = split.offsets[1:-1] - 1  # last click of every session but the final one
        follows[last[(last >= 0) & (last < len(follows))]] = False
        src = split.items[:-1][follows]
        dst = split.items[1:][follows]
        transitions = sparse.csr_matrix(
            (np.ones(len(src), dtype=np.float32), (src, dst)), shape=(n_items, n_items)
        )  # duplicates summed: counts
        transitions.sum_duplicates()
        return cls(transitions, counts)

    def begin(self, n_sessions: int) -> None:
        self._out = np.empty((n_sessions, self.n_items), dtype=np.float32)

    def advance(self, items: np.ndarray) -> np.ndarray:
        out = self._out
        out[:] = self._tiebreak  # [n, n_items]
        rows = self.transitions[items]  # CSR [n, n_items], one row per slot
        slot = np.repeat(np.arange(len(items)), np.diff(rows.indptr))
        out[slot, rows.indices] += rows.data  # CSR rows hold each column once, so += is exact
        return out


class ItemKNN:
    """Item-to-item neighbours from session co-occurrence (Hidasi et al., ICLR 2016, baseline).

    With X the binary session x item matrix of the training split, C = X^T X counts the sessions
    in which two items occur together and s_i = C_ii the sessions in which item i occurs:

        sim(i, j) = C_ij / (sqrt(s_i * s_j) + lambda)

    lambda (`regulariser`, default 20, from memory of the published baseline's setting) damps
    accidental high similarities between rarely seen items; lambda = 0 is plain cosine similarity
    of the items' session-occurrence vectors. Each item keeps its `neighbours` most similar other
    items (similarity > 0; equal similarity: more popular first).

    A session is scored by its last click's neighbours, popularity breaking ties. The scores encode
    each neighbour's position in that ordered list (1 + (K - position) / K, in (1, 2]) rather than
    the raw similarity, so that equal similarities stay ordered by popularity in float32; items
    outside the list score their popularity tiebreak in [0, 1). Order, all the evaluator uses, is
    exactly (similarity, popularity).
    """

    name = "item-knn"

    def __init__(self, items: np.ndarray, scores: np.ndarray, counts: np.ndarray) -> None:
        self._items = items  # int32 [n_items, K], -1 where an item has fewer neighbours
        self._scores = scores  # float32 [n_items, K], descending similarity
        self.counts = np.asarray(counts, dtype=np.int64)
        self.n_items = len(self.counts)
        width = items.shape[1]
        self._position_score = (1.0 + (width - np.arange(width)) / max(width, 1)).astype(np.float32)  # [K]
        self._tiebreak = popularity_tiebreak(self.counts)
        self._out = np.empty((0, self.n_items), dtype=np.float32)

    @classmethod
    def fit(cls, split: SessionSplit, n_items: int, neighbours: int = 100, regulariser: float = 20.0) -> "ItemKNN":
        if neighbours < 1:
            raise ValueError(f"neighbours must be a positive integer, got {neighbours}")
        if regulariser < 0:
            raise ValueError(f"regulariser must be >= 0, got {regulariser}")
        counts = click_counts(split, n_items)
        tiebreak = popularity_tiebreak(counts).astype(np.float64)
        width = max(1, min(neighbours, n_items - 1))

        session_of_click = np.repeat(np.arange(split.n_sessions), split.lengths())
        x = sparse.csr_matrix(
            (np.ones(split.n_clicks, dtype=np.float64), (session_of_click, split.items)), shape=(split.n_sessions, n_items)
        )  # [sessions, items]
        x.sum_duplicates()
        x.data[:] = 1.0  # occurrence, not clicks: a session that clicks an item twice counts once
        xt = x.T.tocsr()  # [items, sessions]
        support = np.diff(xt.indptr).astype(np.float64)  # s_i, sessions containing item i

        # Rows of C are computed in blocks whose entries stay bounded: the non-zeros of row i are at
        # most the summed distinct lengths of the sessions containing i.
        bound = np.minimum(xt @ np.diff(x.indptr).astype(np.float64), n_items)  # [items]
        cuts = _block_cuts(bound, _KNN_BLOCK_ENTRIES)

        table_items = np.full((n_items, width), -1, dtype=np.int32)
        table_scores = np.zeros((n_items, width), dtype=np.float32)
        for a, b in zip(cuts[:-1], cuts[1:]):
            c = (xt[a:b] @ x).tocoo()  # [b - a, items] co-occurrence counts
            row = c.row.astype(np.int64) + a
            col = c.col.astype(np.int64)
            keep = row != col  # an item is not its own neighbour
            row, col, co = row[keep], col[keep], c.data[keep]
            sim = co / (np.sqrt(support[row] * support[col]) + regulariser)  # > 0: both items occur
            order = np.lexsort((-tiebreak[col], -sim, row))  # by row, then similarity, then popularity
            row, col, sim = row[order], col[order], sim[order]
            first = np.searchsorted(row, row, side="left")  # start of each entry's row
            position = np.arange(len(row)) - first
            top = position < width
            table_items[row[top], position[top]] = col[top]
            table_scores[row[top], position[top]] = sim[top]
        return cls(table_items, table_scores, counts)

    def neighbour_table(self) -> tuple[np.ndarray, np.ndarray]:
        """(items int32 [n_items, K] padded with -1, similarities float32 [n_items, K], descending)."""
        return self._items, self._scores

    def begin(self, n_sessions: int) -> None:
        self._out = np.empty((n_sessions, self.n_items), dtype=np.float32)

    def advance(self, items: np.ndarray) -> np.ndarray:
        out = self._out
        out[:] = self._tiebreak  # [n, n_items]
        nb = self._items[items]  # [n, K]
        slot, position = np.nonzero(nb >= 0)
        out[slot, nb[slot, position]] = self._position_score[position]
        return out


def _block_cuts(bound: np.ndarray, limit: int) -> np.ndarray:
    """Row boundaries [0, ..., n] such that each block's summed bound is about `limit` or one row."""
    n = len(bound)
    cumulative = np.cumsum(bound)
    cuts = [0]
    while cuts[-1] < n:
        start = cuts[-1]
        base = cumulative[start - 1] if start > 0 else 0.0
        end = int(np.searchsorted(cumulative, base + limit, side="right"))
        cuts.append(max(end, start + 1))
    return np.asarray(cuts, dtype=np.int64)


def _check_items(split: SessionSplit, n_items: int) -> None:
    if split.n_clicks and (int(split.items.min()) < 0 or int(split.items.max()) >= n_items):
        bad = int(split.items.max()) if int(split.items.max()) >= n_items else int(split.items.min())
        raise InputDataError(f"item index {bad} outside the catalogue of {n_items} items")
