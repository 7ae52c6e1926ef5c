"""Next-click metrics and the session bootstrap behind their confidence intervals.

Every target click is an event with a rank r = 1 + the number of items scored strictly higher.
Metrics average over events, so every target click weighs the same (as in the evaluation of the
GRU recommender paper, Hidasi et al., ICLR 2016):

    Recall@k      share of events with r <= k
    MRR@k         mean of 1/r, counting 0 when r > k (the published cut-off convention)
    Coverage@k    share of the catalogue that appears in at least one top-k list
    click_share@k  mean training click share (share of training clicks) of the top-k items

Clicks of one session are not independent, so confidence intervals resample whole sessions
(percentile bootstrap, Efron and Tibshirani, 1993): a resample is a vector of session weights
(how often each session was drawn); Recall, MRR and Popularity are ratios of weighted session
sums, Coverage counts the items reached by sessions of positive weight (the evaluator removes the
downward bias this count has under resampling, see `evaluate.py`).
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np
from scipy import sparse

# Session weights generated per chunk: resamples x sessions entries at most (64 MiB of int64).
_WEIGHT_CHUNK_ENTRIES = 1 << 23


def popularity_shares(counts: np.ndarray) -> np.ndarray:
    """Training clicks per item as a share of all training clicks, float64 [n_items]."""
    counts = np.asarray(counts, dtype=np.float64)
    total = counts.sum()
    return counts / total if total > 0 else counts


def recall_at_k(ranks: np.ndarray, k: int) -> float:
    return float(np.mean(ranks <= k)) if len(ranks) else 0.0


def reciprocal_ranks(ranks: np.ndarray, k: int | None = None) -> np.ndarray:
    """1 / rank per event, 0 where the rank is beyond the cut-off k (None: no cut-off), float64 [m]."""
    rr = 1.0 / np.asarray(ranks, dtype=np.float64)
    if k is not None:
        rr[ranks > k] = 0.0
    return rr


def mrr_at_k(ranks: np.ndarray, k: int | None = None) -> float:
    return float(reciprocal_ranks(ranks, k).mean()) if len(ranks) else 0.0


def top_k_items(scores: np.ndarray, k: int) -> np.ndarray:
    """The k best items of every row, best first (equal scores: lower index first).

    [m, n_items] -> int64 [m, min(k, n_items)]. Finding each row's k-th best score with
    `np.partition` and gathering the items at or above it is several times faster than
    `np.argpartition` over the whole row; a row with many ties at its k-th score (or a NaN) is
    sorted whole, stably, so the rule holds for it too.
    """
    m, n = scores.shape
    k = min(k, n)
    if k == n:
        return np.argsort(-scores, axis=1, kind="stable").astype(np.int64)
    top = np.empty((m, k), dtype=np.int64)
    kth = np.partition(scores, n - k, axis=1)[:, n - k]  # [m], the k-th best score of each row
    # Every item at or above it: at least k per row, more only on ties, none in a row with NaN.
    # Flat indices: 2-D np.nonzero is many times slower.
    rows, cols = np.divmod(np.flatnonzero(scores >= kth[:, None]), n)
    counts = np.bincount(rows, minlength=m)
    whole = (counts < k) | (counts > 2 * k)  # rows sorted whole
    if whole.any():
        kept = ~whole[rows]
        rows, cols = rows[kept], cols[kept]
    order = np.lexsort((cols, -scores[rows, cols], rows))  # by row, best first, then index
    rows, cols = rows[order], cols[order]
    position = np.arange(len(rows)) - np.searchsorted(rows, rows)  # place within its row
    keep = position < k
    top[rows[keep], position[keep]] = cols[keep]
    for row in np.flatnonzero(whole):
        top[row] = np.argsort(-scores[row], kind="stable")[:k]
    return top


def bootstrap_weights(n_sessions: int, resamples: int, seed: int) -> Iterator[np.ndarray]:
    """Session weights of `resamples` bootstrap resamples, in chunks of float64 [b, n_sessions].

    A resample draws n_sessions sessions with replacement; its weights count the draws. The
    chunking depends only on (n_sessions, resamples), so one seed gives the same resamples to
    every recommender evaluated on the same sessions: the basis of the paired comparison.
    """
    rng = np.random.default_rng(seed)
    per_chunk = max(1, _WEIGHT_CHUNK_ENTRIES // max(n_sessions, 1))
    for start in range(0, resamples, per_chunk):
        b = min(per_chunk, resamples - start)
        drawn = rng.integers(0, n_sessions, size=(b, n_sessions))  # [b, S] session drawn
        drawn += (np.arange(b) * n_sessions)[:, None]  # one bin range per resample
        counts = np.bincount(drawn.ravel(), minlength=b * n_sessions)
        yield counts.reshape(b, n_sessions).astype(np.float64)  # [b, S]


def ratio_replicates(weights: np.ndarray, numerators: np.ndarray, denominator: np.ndarray) -> np.ndarray:
    """Weighted ratio metrics: [b, S], [S, M], [S] -> [b, M]."""
    num = weights @ numerators  # [b, M]
    den = weights @ denominator  # [b]
    with np.errstate(invalid="ignore", divide="ignore"):
        return num / den[:, None]


def coverage_replicates(weights: np.ndarray, incidence_t: sparse.csr_matrix) -> np.ndarray:
    """Share of items recommended to at least one drawn session: [b, S], CSR [n_items, S] -> [b]."""
    reached = incidence_t @ weights.T  # [n_items, b] weighted sessions that saw each item
    return (np.asarray(reached) > 0).sum(axis=0) / incidence_t.shape[0]


def percentile_interval(replicates: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """95% percentile interval along axis 0: [B, ...] -> (lo [...], hi [...])."""
    lo, hi = np.nanpercentile(replicates, [2.5, 97.5], axis=0)
    return lo, hi
