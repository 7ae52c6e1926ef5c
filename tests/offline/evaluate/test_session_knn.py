"""Session-KNN against scikit-learn's cosine neighbours and a hand-worked example of the published definition."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.neighbors import NearestNeighbors

from offline.data.dataset import SessionSplit
from offline.evaluate.session_knn import SessionKNN, session_index, visit_weights

# Hand-worked example, items 0..4, sessions in time order:
#   s0: 0 1 2     s1: 1 3     s2: 2 3 4     s3: 0 4
# Clicks per item: 2 each, so popularity ties resolve by the lower index.
TRAIN = SessionSplit.from_sessions([[0, 1, 2], [1, 3], [2, 3, 4], [0, 4]])
N_ITEMS = 5


def ranking(knn: SessionKNN, clicks: list[int]) -> list[int]:
    knn.begin(1)
    for c in clicks:
        scores = knn.advance(np.array([c], dtype=np.int64))
    assert len(np.unique(scores[0])) == N_ITEMS  # no ties left
    return np.argsort(-scores[0], kind="stable").tolist()


def test_ranking_follows_the_published_definition_by_hand() -> None:
    # Jannach and Ludewig (RecSys 2017), session-based kNN: cosine of binary item sets, k most
    # similar of the candidates, items scored by summed similarity. Visit [1, 2] (|s| = 2):
    #   sim(s0) = 2 / sqrt(2 * 3) = 0.816, sim(s1) = 1 / sqrt(2 * 2) = 0.5, sim(s2) = 1 / sqrt(2 * 3) = 0.408,
    #   s3 shares nothing. k = 2 keeps s0, s1: item 1 = 0.816 + 0.5, items 0, 2 = 0.816 (tie: lower
    #   index first), item 3 = 0.5, item 4 unscored.
    knn = SessionKNN.fit(TRAIN, N_ITEMS, neighbours=2, candidates=10, weighting="none")
    assert ranking(knn, [1, 2]) == [1, 0, 2, 3, 4]
    rows, cols, values = knn.neighbour_scores(np.array([[1, 2]]))
    got = dict(zip(cols.tolist(), values.tolist()))
    assert got == pytest.approx({0: 2 / np.sqrt(6), 1: 2 / np.sqrt(6) + 0.5, 2: 2 / np.sqrt(6), 3: 0.5})
    # M = 2 candidates: the two most recent sessions sharing an item are s1 and s2 (s0 is older).
    # item 3 = 0.5 + 0.408, item 1 = 0.5, items 2 and 4 = 0.408, item 0 unscored.
    knn = SessionKNN.fit(TRAIN, N_ITEMS, neighbours=2, candidates=2, weighting="none")
    assert ranking(knn, [1, 2]) == [3, 1, 2, 4, 0]


def test_sequence_aware_weights_favour_the_latest_click_by_hand() -> None:
    # Ludewig and Jannach (2018), V-SKNN with linear decay: visit [1, 2] weighs item 1 by 1/2 and
    # item 2 by 1. |v| = sqrt(1.25). sim(s0) = 1.5 / (sqrt(1.25) sqrt(3)) = 0.775,
    # sim(s2) = 1 / (sqrt(1.25) sqrt(3)) = 0.516, sim(s1) = 0.5 / (sqrt(1.25) sqrt(2)) = 0.316.
    # k = 2 keeps s0, s2: item 2 = 1.291, items 0, 1 = 0.775, items 3, 4 = 0.516.
    knn = SessionKNN.fit(TRAIN, N_ITEMS, neighbours=2, candidates=10, weighting="linear")
    rows, sessions, sims = knn.similarities(np.array([[1, 2]]))
    assert sessions.tolist() == [0, 2]
    assert sims == pytest.approx([1.5 / np.sqrt(1.25 * 3), 1.0 / np.sqrt(1.25 * 3)])
    assert ranking(knn, [1, 2]) == [2, 0, 1, 3, 4]
    items, weights = visit_weights(np.array([1, 2, 1, 3]), "linear")
    assert items.tolist() == [1, 2, 3] and weights.tolist() == [0.75, 0.5, 1.0]  # item 1: its latest click


def random_log(seed: int, n_sessions: int = 60, n_items: int = 25) -> tuple[SessionSplit, np.ndarray]:
    rng = np.random.default_rng(seed)
    sessions, x = [], np.zeros((n_sessions, n_items))
    for s in range(n_sessions):
        clicks = rng.integers(0, n_items, size=rng.integers(1, 7)).tolist()
        sessions.append(clicks)
        x[s, clicks] = 1.0
    return SessionSplit.from_sessions(sessions), x


@pytest.mark.parametrize("weighting", ["none", "linear"])
def test_similarities_and_neighbour_sets_equal_scikit_learn_cosine_neighbours(weighting: str) -> None:
    # Reference: sklearn.neighbors.NearestNeighbors(metric="cosine", algorithm="brute") over the
    # binary session vectors; similarity = 1 - cosine distance. With M above the number of sessions
    # every session sharing an item is a candidate, so the k most similar must be sklearn's k nearest
    # among those with similarity > 0 (equal similarities at the boundary may swap).
    split, x = random_log(seed=3)
    k = 7
    knn = SessionKNN.fit(split, x.shape[1], neighbours=k, candidates=1000, weighting=weighting)
    nn = NearestNeighbors(metric="cosine", algorithm="brute").fit(x)
    rng = np.random.default_rng(4)
    history = rng.integers(0, x.shape[1], size=(12, 4))
    rows, sessions, sims = knn.similarities(history)
    for r in range(len(history)):
        items, weights = visit_weights(history[r], weighting)
        query = np.zeros(x.shape[1])
        query[items] = weights
        dist, idx = nn.kneighbors(query[None, :], n_neighbors=len(x))
        ref_sim = 1.0 - dist[0]
        positive = ref_sim > 1e-12
        ref_sim, idx = ref_sim[positive], idx[0][positive]
        ours = rows == r
        np.testing.assert_allclose(sims[ours], ref_sim[:k], rtol=1e-9, atol=1e-12)
        kth = ref_sim[: k][-1]
        assert set(sessions[ours].tolist()) <= set(idx[ref_sim >= kth - 1e-12].tolist())
        assert set(idx[ref_sim > kth + 1e-12].tolist()) <= set(sessions[ours].tolist())


def test_candidates_are_the_most_recent_sessions_sharing_an_item() -> None:
    # The definition picks the M most recent sessions sharing an item with the visit; the index keeps
    # only the M most recent per item. Brute force over the sessions checks they agree.
    split, x = random_log(seed=5, n_sessions=80)
    m = 6
    index = session_index(split, x.shape[1], m)
    for item in range(x.shape[1]):
        expected = np.flatnonzero(x[:, item])[::-1][:m]
        assert index.item_sessions[index.item_indptr[item] : index.item_indptr[item + 1]].tolist() == expected.tolist()
    knn = SessionKNN(index, np.bincount(split.items, minlength=x.shape[1]), neighbours=m, weighting="none")
    visit = np.array([[0, 3, 7]])
    _, sessions, _ = knn.similarities(visit)
    sharing = np.flatnonzero(x[:, [0, 3, 7]].sum(axis=1) > 0)[::-1][:m]
    assert sorted(sessions.tolist()) == sorted(sharing.tolist())


def test_side_by_side_visits_do_not_mix() -> None:
    split, x = random_log(seed=6)
    knn = SessionKNN.fit(split, x.shape[1], neighbours=5, candidates=20)
    visits = [[1, 2, 3], [4, 4, 9], [10, 11, 0]]
    knn.begin(3)
    for t in range(3):
        together = knn.advance(np.array([v[t] for v in visits])).copy()
    for r, v in enumerate(visits):
        knn.begin(1)
        for c in v:
            alone = knn.advance(np.array([c]))
        # the encoded scores depend on the batch; the order (all the evaluator uses) must not
        assert np.argsort(-together[r], kind="stable").tolist() == np.argsort(-alone[0], kind="stable").tolist()


def test_bad_parameters_are_refused() -> None:
    with pytest.raises(ValueError, match="neighbours"):
        SessionKNN.fit(TRAIN, N_ITEMS, neighbours=0)
    with pytest.raises(ValueError, match="candidates"):
        SessionKNN.fit(TRAIN, N_ITEMS, candidates=0)
    with pytest.raises(ValueError, match="weighting"):
        SessionKNN.fit(TRAIN, N_ITEMS, weighting="cubic")


def test_skipping_the_rows_the_evaluator_drops_changes_no_result() -> None:
    from offline.evaluate.evaluation import evaluate

    split, x = random_log(seed=8, n_sessions=200)
    test, _ = random_log(seed=9, n_sessions=120)
    counts = np.bincount(split.items, minlength=x.shape[1])

    class EveryRow(SessionKNN):
        @property
        def needed(self):  # always None: every row scored
            return None

        @needed.setter
        def needed(self, value) -> None:
            pass

    a = evaluate(SessionKNN.fit(split, x.shape[1], neighbours=5, candidates=30), test, (1, 5, 20), popularity=counts, bootstrap=5, batch_size=16)
    full = EveryRow(session_index(split, x.shape[1], 30), counts, neighbours=5)
    b = evaluate(full, test, (1, 5, 20), popularity=counts, bootstrap=5, batch_size=16)
    np.testing.assert_array_equal(a.sums, b.sums)
