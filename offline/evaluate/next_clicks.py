"""Walk test sessions click by click, many sessions side by side, for any `SessionScorer`.

The next-click protocol: for every session, each click after the first is a target, predicted from
the clicks before it. Sessions are grouped by length (longest first) so that a batch of slots runs
for about the same number of steps and little work is spent on slots whose session has ended.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np

from offline.data.dataset import SessionSplit
from offline.evaluate.ranking_metrics import top_k_items
from offline.evaluate.scorer import SessionScorer, TopLists


@dataclass
class EventBatch:
    sessions: np.ndarray  # int64 [m], index of the session in the split
    positions: np.ndarray  # int64 [m], index of the target click within its session (>= 1)
    scores: np.ndarray | TopLists  # float32 [m, n_items] (or each row's best), scores given before the target click
    targets: np.ndarray  # int64 [m], the clicked item


def iterate_events(scorer: SessionScorer, split: SessionSplit, batch_size: int = 256) -> Iterator[EventBatch]:
    lengths = split.lengths()
    order = np.argsort(-lengths, kind="stable")
    order = order[lengths[order] >= 2]
    for start in range(0, len(order), batch_size):
        chunk = order[start : start + batch_size]  # sessions of this batch, longest first
        chunk_len = lengths[chunk]
        begins = split.offsets[chunk]
        scorer.begin(len(chunk))
        for t in range(int(chunk_len[0]) - 1):
            # Slots whose session is over repeat their last click; their scores are dropped below.
            pos = begins + np.minimum(t, chunk_len - 1)
            active = chunk_len > t + 1
            if not active.any():
                break
            if hasattr(scorer, "needed"):
                scorer.needed = active  # optional: a scorer may skip the rows whose scores are dropped
            scores = scorer.advance(split.items[pos].astype(np.int64))  # [n, n_items] or TopLists
            targets = split.items[begins[active] + t + 1].astype(np.int64)
            yield EventBatch(
                sessions=chunk[active].astype(np.int64),
                positions=np.full(int(active.sum()), t + 1, dtype=np.int64),
                scores=scores[active] if not active.all() else scores,
                targets=targets,
            )


def target_ranks(scores: np.ndarray | TopLists, targets: np.ndarray) -> np.ndarray:
    """1-based rank of each target: 1 + the number of items scored strictly higher.

    Ties resolve in the target's favour, as in the evaluation code published with the GRU
    recommender paper (from memory); scorers add a small popularity term so ties are rare.
    """
    if isinstance(scores, TopLists):
        return scores.ranks(targets)
    target_scores = scores[np.arange(len(targets)), targets]  # [m]
    return (scores > target_scores[:, None]).sum(axis=1) + 1


def best_items(scores: np.ndarray | TopLists, k: int) -> np.ndarray:
    """The k best items of every row, best first, equal scores by lower index, int64 [m, min(k, n_items)]."""
    return scores.best(k) if isinstance(scores, TopLists) else top_k_items(scores, k)
