"""The one protocol every offline recommender implements, so one evaluator measures them all.

The evaluator runs a batch of sessions side by side: `begin(n)` starts n empty sessions, then each
`advance(items)` feeds one click to each of the n sessions and returns the scores of every item as
the next click, float32 [n, n_items]. Higher is better. Slots whose session has already ended are
fed a repeat of their last click; their scores are ignored. A scorer with a `needed` attribute is
told before each `advance` which rows will be read (bool [n]) and may leave the others unscored.

A scorer that only finds each row's best K items (the service's approximate and reduced-precision
paths) returns them as `TopLists` instead: every item it does not list ranks below every listed
one, exactly as if its dense row held -inf there, without writing n_items scores per row (which at
a million items costs more than the scoring itself).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Protocol

import numpy as np

from offline.evaluate.ranking_metrics import top_k_items


class SessionScorer(Protocol):
    name: str
    n_items: int

    def begin(self, n_sessions: int) -> None: ...

    def advance(self, items: np.ndarray) -> "np.ndarray | TopLists": ...


@dataclass(frozen=True)
class TopLists:
    """Each row's best K items and their scores; every other item scores -inf.

    Every rule here gives what the same rule gives on `dense()`: the ranks of `next_clicks`, the
    best-k lists of `ranking_metrics.top_k_items` and the evaluator's seen-item exclusion.
    """

    items: np.ndarray  # int64 [n, K], distinct within a row
    scores: np.ndarray  # float32 [n, K]
    n_items: int

    @property
    def width(self) -> int:
        return self.items.shape[1]

    def __len__(self) -> int:
        return len(self.items)

    def __getitem__(self, rows: np.ndarray) -> "TopLists":
        """The rows selected by a bool mask or indices, as an array's rows are."""
        return TopLists(self.items[rows], self.scores[rows], self.n_items)

    def dense(self) -> np.ndarray:
        """float32 [n, n_items], -inf outside the lists."""
        out = np.full((len(self.items), self.n_items), -np.inf, dtype=np.float32)
        np.put_along_axis(out, self.items, self.scores, axis=1)
        return out

    def ranks(self, targets: np.ndarray) -> np.ndarray:
        """1 + the number of items scored strictly higher than each target (-inf when unlisted), int64 [n]."""
        listed = self.items == targets[:, None]  # [n, K]
        target_scores = np.where(listed, self.scores, -np.inf).max(axis=1)  # [n]
        return (self.scores > target_scores[:, None]).sum(axis=1) + 1

    def best(self, k: int) -> np.ndarray:
        """The k best items of every row, best first, equal scores by lower index, int64 [n, min(k, n_items)]."""
        k = min(k, self.n_items)
        order = np.lexsort((self.items, -self.scores), axis=1)  # [n, K] by score, then index
        top = np.take_along_axis(self.items, order, axis=1)[:, :k]
        short = np.flatnonzero(np.isfinite(self.scores).sum(axis=1) < k)
        if len(short):
            # Fewer than k finite scores: the rest of the list is -inf items by index, which are
            # mostly unlisted ones; those few rows are ranked densely.
            top = np.concatenate([top, np.zeros((len(top), k - top.shape[1]), np.int64)], axis=1) if top.shape[1] < k else top
            top[short] = top_k_items(self[short].dense(), k)
        return top

    def without(self, rows: np.ndarray, items: np.ndarray) -> "TopLists":
        """A copy with item items[j] of row rows[j] at -inf (the visits' seen items)."""
        keys = rows.astype(np.int64) * self.n_items + items
        listed = (np.arange(len(self.items), dtype=np.int64)[:, None] * self.n_items + self.items).ravel()
        scores = self.scores.copy()
        scores.reshape(-1)[np.isin(listed, keys)] = -np.inf
        return TopLists(self.items, scores, self.n_items)
