"""The baselines on a training set small enough to work out by hand, and item-KNN against scikit-learn."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics.pairwise import cosine_similarity

from service.errors import InputDataError
from offline.evaluate import baselines
from offline.evaluate.baselines import ItemKNN, Markov, Popularity, SessionPopularity, popularity_tiebreak
from offline.data.dataset import SessionSplit

# Hand-made training set, items 0..4:
#   s0: 0 1 2     s1: 0 1     s2: 3 1 3     s3: 4 0 1
# Clicks:   item 0: 3, item 1: 4, item 2: 1, item 3: 2, item 4: 1
# POP order: 1 (4), 0 (3), 3 (2), then 2 and 4 (1 each; equal clicks: lower index first).
TRAIN = SessionSplit.from_sessions([[0, 1, 2], [0, 1], [3, 1, 3], [4, 0, 1]])
N_ITEMS = 5
POP_ORDER = [1, 0, 3, 2, 4]


def ranking(scorer, clicks: list[int]) -> list[int]:
    """Items best first after the clicks of one session; also checks that no two scores tie."""
    scorer.begin(1)
    for c in clicks:
        scores = scorer.advance(np.array([c], dtype=np.int64))  # [1, n_items]
    assert len(np.unique(scores[0])) == N_ITEMS  # the popularity tiebreak leaves no ties
    return np.argsort(-scores[0], kind="stable").tolist()


def test_popularity_ranks_by_training_clicks() -> None:
    pop = Popularity.fit(TRAIN, N_ITEMS)
    assert pop.counts.tolist() == [3, 4, 1, 2, 1]
    assert ranking(pop, [2]) == POP_ORDER
    assert ranking(pop, [4, 3]) == POP_ORDER  # the same list whatever the session


def test_popularity_tiebreak_is_distinct_and_below_one() -> None:
    t = popularity_tiebreak(np.array([3, 4, 1, 2, 1]))
    assert np.argsort(-t, kind="stable").tolist() == POP_ORDER
    assert t.min() >= 0 and t.max() < 1 and len(np.unique(t)) == 5


def test_session_popularity_puts_session_items_first() -> None:
    spop = SessionPopularity.fit(TRAIN, N_ITEMS)
    # Session 4 2 2: in-session counts 2 -> 2, 4 -> 1, so 2 then 4 (both rare in training), then
    # the rest by POP: 1, 0, 3.
    assert ranking(spop, [4, 2, 2]) == [2, 4, 1, 0, 3]
    # One click on 3: 3 first, then POP without it.
    assert ranking(spop, [3]) == [3, 1, 0, 2, 4]


def test_session_popularity_keeps_side_by_side_sessions_apart() -> None:
    spop = SessionPopularity.fit(TRAIN, N_ITEMS)
    spop.begin(2)
    spop.advance(np.array([4, 3]))
    scores = spop.advance(np.array([2, 3]))  # slot 0: 4 2 ; slot 1: 3 3
    assert np.argsort(-scores[0], kind="stable").tolist()[:2] == [2, 4]  # equal counts: POP (2 before 4)
    assert np.argsort(-scores[1], kind="stable").tolist()[:2] == [3, 1]


def test_markov_counts_transitions_forward_within_sessions() -> None:
    markov = Markov.fit(TRAIN, N_ITEMS)
    # Transitions: s0 0->1, 1->2; s1 0->1; s2 3->1, 1->3; s3 4->0, 0->1.
    # Not counted: 2->0 and 1->3 across session ends (s0 -> s1, s1 -> s2), nor any reverse pair.
    t = markov.transitions.toarray()
    expected = np.zeros((5, 5))
    expected[0, 1], expected[1, 2], expected[1, 3], expected[3, 1], expected[4, 0] = 3, 1, 1, 1, 1
    np.testing.assert_array_equal(t, expected)
    # After 1: followers 2 and 3 once each; 3 has more clicks, so 3, 2; then POP: 1, 0, 4.
    assert ranking(markov, [1]) == [3, 2, 1, 0, 4]
    # After 0: 1 followed 0 three times. Direction: 0 never followed 1 (0->1 is not 1->0), above.
    assert ranking(markov, [0])[0] == 1
    # After 2: nothing ever followed 2 within a session (2->0 crossed a session end): POP.
    assert ranking(markov, [2]) == POP_ORDER
    # Only the last click matters: 2 then 4 -> 4's follower 0 first, then POP.
    assert ranking(markov, [2, 4]) == [0, 1, 3, 2, 4]


def test_item_knn_on_the_hand_made_set() -> None:
    # Session-occurrence sets: s0 {0,1,2}, s1 {0,1}, s2 {1,3}, s3 {0,1,4}
    # (s2 clicks 3 twice; occurrence counts it once). Support: 0: 3, 1: 4, 2: 1, 3: 1, 4: 1.
    # Co-occurrence: C01 = 3; C02 = C04 = 1; C12 = C13 = C14 = 1; others 0.
    # sim(i, j) = C_ij / (sqrt(s_i s_j) + 20):
    #   sim(0,1) = 3 / (sqrt(12) + 20) = 0.127853...
    #   sim(0,2) = sim(0,4) = 1 / (sqrt(3) + 20) = 0.046014...
    #   sim(1,2) = sim(1,3) = sim(1,4) = 1 / (2 + 20) = 0.045454...
    knn = ItemKNN.fit(TRAIN, N_ITEMS, neighbours=100, regulariser=20.0)
    items, scores = knn.neighbour_table()
    assert items.dtype == np.int32 and scores.dtype == np.float32
    assert items.shape == (5, 4)  # at most n_items - 1 neighbours
    # Item 1: 0 first; then 2, 3, 4 tie at 1/22 and are ordered by popularity: 3 (2 clicks), 2, 4.
    assert items[1].tolist() == [0, 3, 2, 4]
    np.testing.assert_allclose(scores[1], [3 / (12**0.5 + 20), 1 / 22, 1 / 22, 1 / 22], rtol=1e-6)
    assert items[0].tolist() == [1, 2, 4, -1]
    np.testing.assert_allclose(scores[0], [3 / (12**0.5 + 20), 1 / (3**0.5 + 20), 1 / (3**0.5 + 20), 0], rtol=1e-6)
    assert items[3].tolist() == [1, -1, -1, -1]
    # A session is scored by its last click's neighbours, then POP for the rest.
    assert ranking(knn, [3, 1]) == [0, 3, 2, 4, 1]
    assert ranking(knn, [1, 3]) == [1, 0, 3, 2, 4]


def test_item_knn_keeps_the_top_neighbours() -> None:
    knn = ItemKNN.fit(TRAIN, N_ITEMS, neighbours=2)
    items, _ = knn.neighbour_table()
    assert items.shape == (5, 2)
    assert items[1].tolist() == [0, 3]


def occurrence_split(seed: int, n_sessions: int = 80, n_items: int = 15) -> tuple[SessionSplit, np.ndarray]:
    """Random sessions (with repeated clicks) and their binary session x item occurrence matrix."""
    rng = np.random.default_rng(seed)
    sessions, x = [], np.zeros((n_sessions, n_items))
    for s in range(n_sessions):
        clicks = rng.integers(0, n_items, size=rng.integers(1, 7)).tolist()
        sessions.append(clicks)
        x[s, clicks] = 1.0
    return SessionSplit.from_sessions(sessions), x


def dense_similarities(knn: ItemKNN, n_items: int) -> np.ndarray:
    items, scores = knn.neighbour_table()
    sim = np.zeros((n_items, n_items))
    for i in range(n_items):
        ok = items[i] >= 0
        sim[i, items[i][ok]] = scores[i][ok]
    return sim


def test_item_knn_without_regulariser_is_scikit_learn_cosine_similarity() -> None:
    # Reference: sklearn.metrics.pairwise.cosine_similarity of the items' session-occurrence
    # vectors (columns of the binary session x item matrix); an item is not its own neighbour.
    split, x = occurrence_split(seed=1)
    knn = ItemKNN.fit(split, 15, neighbours=14, regulariser=0.0)
    expected = cosine_similarity(x.T)
    np.fill_diagonal(expected, 0.0)
    np.testing.assert_allclose(dense_similarities(knn, 15), expected, rtol=1e-5, atol=1e-7)
    _, scores = knn.neighbour_table()
    assert (np.diff(scores, axis=1) <= 0).all()  # descending


def test_item_knn_regulariser_follows_the_published_formula(monkeypatch: pytest.MonkeyPatch) -> None:
    # Reference: the item-KNN baseline of Hidasi et al. (ICLR 2016): co-occurrence over the square
    # root of the product of supports, with a regularising term added to the denominator.
    # A tiny block size forces the blockwise computation of X^T X through many blocks.
    monkeypatch.setattr(baselines, "_KNN_BLOCK_ENTRIES", 8)
    split, x = occurrence_split(seed=2)
    co = x.T @ x
    support = np.diag(co)
    expected = co / (np.sqrt(np.outer(support, support)) + 20.0)
    np.fill_diagonal(expected, 0.0)
    knn = ItemKNN.fit(split, 15, neighbours=14, regulariser=20.0)
    np.testing.assert_allclose(dense_similarities(knn, 15), expected, rtol=1e-5, atol=1e-7)
    # Keeping 3 neighbours keeps each row's 3 largest similarities.
    _, scores = ItemKNN.fit(split, 15, neighbours=3, regulariser=20.0).neighbour_table()
    np.testing.assert_allclose(scores, -np.sort(-expected, axis=1)[:, :3], rtol=1e-5)


def test_an_item_outside_the_catalogue_is_refused() -> None:
    with pytest.raises(InputDataError, match="item index 7"):
        Markov.fit(SessionSplit.from_sessions([[0, 7]]), 5)
    with pytest.raises(ValueError, match="neighbours"):
        ItemKNN.fit(TRAIN, N_ITEMS, neighbours=0)
