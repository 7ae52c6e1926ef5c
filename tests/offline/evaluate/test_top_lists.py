"""`TopLists` (a top-N scorer's answer) against the dense rows it stands for: every rule the
evaluator applies must give what it gives on the dense row with -inf outside the lists."""

from __future__ import annotations

import numpy as np
import pytest

from offline.data.dataset import SessionSplit
from offline.evaluate.evaluation import evaluate
from offline.evaluate.next_clicks import best_items, target_ranks
from offline.evaluate.scorer import TopLists
from service.errors import InputDataError


def random_lists(seed: int, n: int = 60, n_items: int = 300, width: int = 25) -> TopLists:
    rng = np.random.default_rng(seed)
    items = np.stack([rng.choice(n_items, size=width, replace=False) for _ in range(n)])  # distinct per row
    scores = rng.standard_normal((n, width)).astype(np.float32)
    scores[0, :10] = 1.5  # ties inside a list
    scores[1, 5:] = -np.inf  # a row with fewer finite scores than k
    return TopLists(items.astype(np.int64), scores, n_items)


def test_ranks_equal_the_dense_rows() -> None:
    lists = random_lists(seed=1)
    rng = np.random.default_rng(2)
    targets = np.where(rng.random(len(lists)) < 0.5, lists.items[:, 3], rng.integers(0, lists.n_items, len(lists)))
    np.testing.assert_array_equal(target_ranks(lists, targets), target_ranks(lists.dense(), targets))


@pytest.mark.parametrize("k", [1, 5, 20, 25, 40])
def test_best_items_equal_a_stable_sort_of_the_dense_rows(k: int) -> None:
    # Reference: numpy's stable argsort of the negated dense scores (best first, equal scores by
    # index), rows with fewer finite scores than k included (they fill up with -inf items by index).
    lists = random_lists(seed=3)
    expected = np.argsort(-lists.dense(), axis=1, kind="stable")[:, :k]
    np.testing.assert_array_equal(best_items(lists, k), expected)


def test_seen_items_drop_as_in_the_dense_rows() -> None:
    lists = random_lists(seed=4)
    rows = np.array([0, 0, 2, 5, 5, 5])
    items = np.array([lists.items[0, 0], 7, lists.items[2, 4], lists.items[5, 0], lists.items[5, 1], 299])
    dense = lists.dense()
    dense[rows, items] = -np.inf
    np.testing.assert_array_equal(lists.without(rows, items).dense(), dense)
    np.testing.assert_array_equal(lists.dense()[rows, items] == -np.inf, np.isin(items, [7, 299]))  # the original is untouched


class ListScorer:
    """A fixed random table as a top-N scorer: each last click's best `width` items, or the dense row."""

    def __init__(self, n_items: int, width: int, dense: bool) -> None:
        table = np.random.default_rng(5).standard_normal((n_items, n_items)).astype(np.float32)
        order = np.argsort(-table, axis=1, kind="stable")[:, :width]
        self.lists = TopLists(order, np.take_along_axis(table, order, axis=1), n_items)
        self.n_items, self.name, self.dense = n_items, "lists", dense

    def begin(self, n_sessions: int) -> None:
        pass

    def advance(self, items: np.ndarray) -> np.ndarray | TopLists:
        rows = self.lists[items]
        return rows.dense() if self.dense else rows


@pytest.mark.parametrize("exclude_seen", [False, True])
def test_evaluation_of_lists_equals_evaluation_of_their_dense_rows(exclude_seen: bool) -> None:
    rng = np.random.default_rng(6)
    split = SessionSplit.from_sessions([rng.integers(0, 80, int(rng.integers(1, 30))).tolist() for _ in range(200)])
    popularity = np.bincount(split.items, minlength=80)
    kwargs = dict(ks=(5, 20), popularity=popularity, bootstrap=50, exclude_seen=exclude_seen, batch_size=64)
    # 30 listed of 80 and up to 29 seen: some lists keep fewer than 20 finite scores
    as_lists = evaluate(ListScorer(80, 30, dense=False), split, **kwargs)
    as_dense = evaluate(ListScorer(80, 30, dense=True), split, **kwargs)
    assert as_lists.metrics == as_dense.metrics
    np.testing.assert_array_equal(as_lists.groups.curve, as_dense.groups.curve)


def test_a_cut_off_beyond_the_lists_is_refused() -> None:
    split = SessionSplit.from_sessions([[1, 2, 3], [4, 5]])
    with pytest.raises(InputDataError, match="cut-off 40 is beyond the 30 items"):
        evaluate(ListScorer(80, 30, dense=False), split, ks=(40,), popularity=np.ones(80), bootstrap=10)
