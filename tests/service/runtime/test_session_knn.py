"""The served session-KNN ranks a visit exactly as the offline scorer does (the one checked against
scikit-learn and the published definition in tests/offline/evaluate/test_session_knn.py)."""

from __future__ import annotations

import numpy as np
import pytest

from offline.data.dataset import SessionSplit
from offline.evaluate.baselines import click_counts
from offline.evaluate.session_knn import SessionKNN
from service.runtime.recommenders import PopularityRecommender
from service.runtime.session_knn import SessionKnnRecommender, _ranges


def random_log(seed: int, n_sessions: int = 200, n_items: int = 40) -> SessionSplit:
    rng = np.random.default_rng(seed)
    return SessionSplit.from_sessions([rng.integers(0, n_items, size=rng.integers(1, 8)).tolist() for _ in range(n_sessions)])


@pytest.mark.parametrize(("weighting", "neighbours", "candidates"), [("none", 10, 30), ("linear", 25, 500), ("linear", 3, 5)])
def test_served_lists_equal_the_offline_ranking(weighting: str, neighbours: int, candidates: int) -> None:
    split, n_items = random_log(1), 40
    offline = SessionKNN.fit(split, n_items, neighbours=neighbours, candidates=candidates, weighting=weighting)
    served = SessionKnnRecommender(offline.index, PopularityRecommender(click_counts(split, n_items).astype(np.float32)), neighbours, weighting)
    rng = np.random.default_rng(2)
    for _ in range(30):
        visit = rng.integers(0, n_items, size=rng.integers(1, 6)).tolist()
        offline.begin(1)
        for c in visit:
            scores = offline.advance(np.array([c]))[0]
        expected = np.argsort(-scores, kind="stable")[:20].tolist()
        assert served.recommend(visit, 20).items == expected
        seen = frozenset(visit)
        assert served.recommend(visit, 20, seen).items == [i for i in expected + np.argsort(-scores, kind="stable")[20:].tolist() if i not in seen][:20]


def test_summed_similarities_equal_the_offline_scores() -> None:
    split, n_items = random_log(3), 40
    offline = SessionKNN.fit(split, n_items, neighbours=8, candidates=50, weighting="linear")
    served = SessionKnnRecommender(offline.index, PopularityRecommender(np.ones(n_items, np.float32)), 8, "linear")
    visit = [4, 9, 4, 17]
    _, cols, values = offline.neighbour_scores(np.array([visit]))
    items, scores = served.scores(visit)
    assert dict(zip(items.tolist(), scores.tolist())) == pytest.approx(dict(zip(cols.tolist(), values.tolist())))


def test_an_empty_visit_or_no_neighbour_answers_from_popularity() -> None:
    split = SessionSplit.from_sessions([[0, 1], [1, 2]])
    offline = SessionKNN.fit(split, 5, neighbours=2, candidates=2)
    popularity = PopularityRecommender(np.array([2, 2, 1, 0, 0], np.float32))
    served = SessionKnnRecommender(offline.index, popularity, 2, "linear")
    assert served.recommend([], 3).items == [0, 1, 2]
    assert served.recommend([4], 3).items == [0, 1, 2]  # item 4 is in no training session
    assert served.recommend([2], 3).items[:2] == [1, 2]


def test_ranges() -> None:
    assert _ranges(np.array([5, 0, 9]), np.array([2, 0, 3])).tolist() == [5, 6, 9, 10, 11]
