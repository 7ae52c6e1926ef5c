"""Metrics and the session bootstrap, checked against scikit-learn, SciPy and worked examples."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import sparse, stats
from sklearn.metrics import label_ranking_average_precision_score, top_k_accuracy_score

from offline.evaluate.next_clicks import target_ranks
from offline.evaluate.ranking_metrics import (
    bootstrap_weights,
    coverage_replicates,
    mrr_at_k,
    percentile_interval,
    popularity_shares,
    ratio_replicates,
    recall_at_k,
    reciprocal_ranks,
    top_k_items,
)


def random_events(seed: int, m: int = 300, n_items: int = 40) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    scores = rng.standard_normal((m, n_items)).astype(np.float32)  # continuous: no ties
    targets = rng.integers(0, n_items, size=m)
    return scores, targets


@pytest.mark.parametrize("k", [1, 5, 20])
def test_recall_equals_scikit_learn_top_k_accuracy(k: int) -> None:
    # Reference: sklearn.metrics.top_k_accuracy_score, the share of rows whose true label is among
    # the k highest scores (scikit-learn documentation, "top_k_accuracy_score").
    scores, targets = random_events(seed=k)
    ranks = target_ranks(scores, targets)
    expected = top_k_accuracy_score(targets, scores, k=k, labels=np.arange(scores.shape[1]))
    assert recall_at_k(ranks, k) == pytest.approx(expected, abs=1e-12)


def test_mrr_without_cut_off_equals_scikit_learn_label_ranking_average_precision() -> None:
    # Reference: sklearn.metrics.label_ranking_average_precision_score; with exactly one relevant
    # label per row the average precision of a row is 1 / rank of that label, so LRAP = MRR.
    scores, targets = random_events(seed=7)
    relevant = np.zeros_like(scores, dtype=int)
    relevant[np.arange(len(targets)), targets] = 1
    ranks = target_ranks(scores, targets)
    expected = label_ranking_average_precision_score(relevant, scores)
    assert mrr_at_k(ranks, None) == pytest.approx(expected, abs=1e-12)


def test_mrr_cut_off_counts_ranks_beyond_k_as_zero() -> None:
    # Worked example of the published convention (Hidasi et al., ICLR 2016: MRR@20, reciprocal rank
    # set to 0 when the target is below rank 20): ranks 1, 2, 5, 30 -> (1 + 1/2 + 1/5 + 0) / 4.
    ranks = np.array([1, 2, 5, 30])
    assert mrr_at_k(ranks, 20) == pytest.approx((1 + 0.5 + 0.2) / 4)
    assert mrr_at_k(ranks, None) == pytest.approx((1 + 0.5 + 0.2 + 1 / 30) / 4)
    assert reciprocal_ranks(ranks, 2).tolist() == [1.0, 0.5, 0.0, 0.0]
    assert recall_at_k(ranks, 5) == 0.75


def test_target_rank_counts_only_strictly_higher_items() -> None:
    # Worked example: target score 0.5; one item above it and one tied -> rank 2.
    scores = np.array([[0.9, 0.5, 0.5, 0.1]], dtype=np.float32)
    assert target_ranks(scores, np.array([1])).tolist() == [2]


def test_top_k_items_match_a_full_stable_sort() -> None:
    # Reference: numpy's stable argsort of the negated scores (best first, equal scores by index).
    scores, _ = random_events(seed=3, m=50, n_items=200)
    scores[0] = 0.0  # a row of ties: sorted whole
    scores[1, :150] = 1.0  # many ties at the k-th score
    scores[2, ::3] = 2.0
    scores[4, 7] = np.nan  # NaN ranks last, as in the reference
    for k in (1, 10, 200, 500):
        expected = np.argsort(-scores, axis=1, kind="stable")[:, :k]
        np.testing.assert_array_equal(top_k_items(scores, k), expected)


def test_popularity_shares_sum_to_one() -> None:
    np.testing.assert_allclose(popularity_shares(np.array([3, 1, 0, 4])), [3 / 8, 1 / 8, 0, 4 / 8])


def test_bootstrap_weights_draw_every_session_count_and_repeat_with_the_seed() -> None:
    chunks = list(bootstrap_weights(n_sessions=37, resamples=500, seed=11))
    w = np.concatenate(chunks)
    assert w.shape == (500, 37)
    np.testing.assert_array_equal(w.sum(axis=1), 37)  # each resample draws n sessions
    np.testing.assert_array_equal(w, np.concatenate(list(bootstrap_weights(37, 500, 11))))
    assert not np.array_equal(w, np.concatenate(list(bootstrap_weights(37, 500, 12))))
    # Multinomial(n, 1/n) draw counts have mean 1 and variance 1 - 1/n (binomial), to sampling error.
    assert w.mean() == pytest.approx(1.0)
    assert w.var() == pytest.approx(1 - 1 / 37, rel=0.05)


def test_ratio_interval_agrees_with_scipy_bootstrap_on_a_mean() -> None:
    # Reference: scipy.stats.bootstrap(method="percentile") on the mean of one value per session.
    rng = np.random.default_rng(5)
    hits = (rng.random(400) < 0.3).astype(np.float64)  # one event per session
    events = np.ones(400)
    reps = np.concatenate([ratio_replicates(w, hits[:, None], events) for w in bootstrap_weights(400, 4000, 1)])
    lo, hi = percentile_interval(reps)
    ref = stats.bootstrap((hits,), np.mean, n_resamples=4000, method="percentile", random_state=2).confidence_interval
    assert lo[0] == pytest.approx(ref.low, abs=0.006)
    assert hi[0] == pytest.approx(ref.high, abs=0.006)
    # And the normal approximation of a binomial proportion, p +- 1.96 sqrt(p (1 - p) / n).
    p = hits.mean()
    half = 1.96 * np.sqrt(p * (1 - p) / 400)
    assert lo[0] == pytest.approx(p - half, abs=0.008)
    assert hi[0] == pytest.approx(p + half, abs=0.008)


def test_ratio_interval_agrees_with_scipy_bootstrap_on_a_ratio_of_session_sums() -> None:
    # Reference: scipy.stats.bootstrap with paired=True resamples whole sessions (both arrays at
    # the same indices), statistic = sum(hits) / sum(events), percentile method.
    rng = np.random.default_rng(8)
    events = rng.integers(1, 9, size=300).astype(np.float64)
    hits = rng.binomial(events.astype(int), rng.uniform(0.1, 0.6, size=300)).astype(np.float64)

    def ratio(h: np.ndarray, e: np.ndarray, axis: int = -1) -> np.ndarray:
        return h.sum(axis=axis) / e.sum(axis=axis)

    ref = stats.bootstrap(
        (hits, events), ratio, paired=True, vectorized=True, n_resamples=4000, method="percentile", random_state=3
    ).confidence_interval
    reps = np.concatenate([ratio_replicates(w, hits[:, None], events) for w in bootstrap_weights(300, 4000, 4)])
    lo, hi = percentile_interval(reps)
    assert lo[0] == pytest.approx(ref.low, abs=0.006)
    assert hi[0] == pytest.approx(ref.high, abs=0.006)


def test_coverage_replicates_equal_the_union_of_drawn_sessions_lists() -> None:
    # Reference: the definition, by brute force: items in the top lists of sessions drawn at least once.
    rng = np.random.default_rng(9)
    n_sessions, n_items = 25, 60
    reached = rng.random((n_sessions, n_items)) < 0.05  # [S, n_items]
    incidence_t = sparse.csr_matrix(reached.T.astype(np.float64))
    w = next(bootstrap_weights(n_sessions, 30, seed=0))
    got = coverage_replicates(w, incidence_t)
    expected = [reached[w[b] > 0].any(axis=0).mean() for b in range(30)]
    np.testing.assert_allclose(got, expected)
