"""Breakdowns by position and popularity on a hand-computed toy, seen-item exclusion, and the
bootstrap intervals against scipy.stats.bootstrap."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from offline.data.dataset import SessionSplit
from offline.evaluate.baselines import Popularity
from offline.evaluate.breakdowns import group_lifts, group_metrics, popularity_groups, position_group, recall_curve
from offline.evaluate.evaluation import evaluate

# Training clicks per item: 6, 3, 2, 1 (12 in all). Laid end to end, most clicked first, item 0
# starts at 0 (head), item 1 at 6/12 (torso), item 2 at 9/12 and item 3 at 11/12 (tail).
COUNTS = np.array([6, 3, 2, 1])


def test_groups_by_hand() -> None:
    assert popularity_groups(COUNTS).tolist() == [0, 1, 2, 2]
    assert popularity_groups(np.array([0, 5, 5, 0])).tolist() == [2, 0, 1, 2]  # unclicked items are tail
    assert position_group(np.array([1, 2, 3, 4, 9, 10, 57])).tolist() == [0, 1, 1, 2, 2, 3, 3]


def test_recall_and_mrr_by_position_and_popularity_by_hand() -> None:
    # Popularity ranks item i at i + 1 for every event. Visits:
    #   A = 3 0 1: targets 0 (after 1 click, rank 1), 1 (after 2, rank 2)
    #   B = 2 2 3 3 0 0 1 1 2 2 3: targets after 1..10 clicks: 2 3 3 0 0 1 1 2 2 3, ranks 3 4 4 1 1 2 2 3 3 4
    # MRR@20 by position: 1: (1 + 1/3) / 2; 2-3: (1/2 + 1/4 + 1/4) / 3; 4-9: (1 + 1 + 1/2 + 1/2 + 1/3 + 1/3) / 6;
    # 10+: 1/4. By popularity: head (item 0): 3 events at rank 1; torso (item 1): 3 at rank 2;
    # tail (items 2, 3): ranks 3, 4, 4, 3, 3, 4. Every rank is within 20: Recall@20 = 1 everywhere.
    split = SessionSplit.from_sessions([[3, 0, 1], [2, 2, 3, 3, 0, 0, 1, 1, 2, 2, 3]])
    result = evaluate(Popularity(COUNTS), split, popularity=COUNTS, bootstrap=50)
    got = group_metrics(result.groups, 50, 0)
    expected_mrr = {
        "position 1": (4 / 3) / 2,
        "position 2-3": 1 / 3,
        "position 4-9": (2 + 1 + 2 / 3) / 6,
        "position 10+": 1 / 4,
        "popularity head": 1.0,
        "popularity torso": 0.5,
        "popularity tail": (3 / 3 + 3 / 4) / 6,
    }
    expected_events = {"position 1": 2, "position 2-3": 3, "position 4-9": 6, "position 10+": 1,
                       "popularity head": 3, "popularity torso": 3, "popularity tail": 6}  # fmt: skip
    for group, mrr in expected_mrr.items():
        assert got[group]["mrr@20"]["value"] == pytest.approx(mrr)
        assert got[group]["recall@20"]["value"] == 1.0
        assert got[group]["events"] == expected_events[group]
    curve = recall_curve(result.groups, 50, 0)
    # ranks over all 12 events: 1 x3, 2 x3, 3 x3, 4 x3
    assert curve["value"][:5] == pytest.approx([3 / 12, 6 / 12, 9 / 12, 1.0, 1.0])


def test_exclude_seen_ranks_clicked_items_last() -> None:
    # Visit 0 1 0 under popularity (order 0 1 2 3): target 1 after {0}: rank 1 without item 0 (2 with
    # it); target 0 after {0, 1}: seen, so last behind items 2 and 3, rank 3 (1 without exclusion).
    split = SessionSplit.from_sessions([[0, 1, 0]])
    plain = evaluate(Popularity(COUNTS), split, (1, 3), popularity=COUNTS, bootstrap=5)
    excluded = evaluate(Popularity(COUNTS), split, (1, 3), popularity=COUNTS, bootstrap=5, exclude_seen=True)
    assert plain.metrics["mrr@3"].value == pytest.approx((1 / 2 + 1) / 2)
    assert excluded.metrics["mrr@3"].value == pytest.approx((1 + 1 / 3) / 2)
    assert excluded.metrics["recall@1"].value == pytest.approx(0.5) and plain.metrics["recall@1"].value == pytest.approx(0.5)
    # the scorer's own buffer is left alone (it is reused for the next click)
    scorer = Popularity(COUNTS)
    evaluate(scorer, split, popularity=COUNTS, bootstrap=5, exclude_seen=True)
    assert np.isfinite(scorer._out).all()


class LastClickTable:
    def __init__(self, table: np.ndarray, name: str) -> None:
        self.table, self.n_items, self.name = table.astype(np.float32), table.shape[0], name

    def begin(self, n: int) -> None:
        pass

    def advance(self, items: np.ndarray) -> np.ndarray:
        return self.table[items]


def random_split(seed: int, n_sessions: int, n_items: int) -> SessionSplit:
    rng = np.random.default_rng(seed)
    sessions = []
    for _ in range(n_sessions):
        clicks = [int(rng.integers(n_items))]
        for _ in range(int(rng.integers(1, 12))):
            clicks.append((clicks[-1] + int(rng.integers(1, 4))) % n_items)
        sessions.append(clicks)
    return SessionSplit.from_sessions(sessions)


def test_group_intervals_and_paired_lifts_agree_with_scipy_bootstrap() -> None:
    # Reference: scipy.stats.bootstrap (percentile method), resampling whole sessions (paired=True
    # over the per-session sums), against our session bootstrap with the same number of resamples.
    # The two use different random draws, so they agree up to Monte Carlo error.
    n_items, resamples = 60, 4000
    split = random_split(1, 400, n_items)
    counts = np.bincount(random_split(2, 400, n_items).items, minlength=n_items)
    rng = np.random.default_rng(3)
    near = np.zeros((n_items, n_items))
    for i in range(n_items):
        near[i, (i + np.arange(1, 4)) % n_items] = 1.0
    a = evaluate(LastClickTable(near + rng.random((n_items, n_items)), "a"), split, popularity=counts, bootstrap=10)
    b = evaluate(LastClickTable(rng.random((n_items, n_items)) + 0.3 * near, "b"), split, popularity=counts, bootstrap=10)
    ours = group_metrics(a.groups, resamples, 0)
    lifts = group_lifts(a.groups, b.groups, resamples, 0)
    for g, group in enumerate(["position 1", "position 4-9", "popularity head"]):
        column = {"position 1": 0, "position 4-9": 2, "popularity head": 4}[group]
        hits, events = a.groups.hits[:, column], a.groups.events[:, column]
        ref = stats.bootstrap(
            (hits, events), lambda h, e, axis: h.sum(axis) / e.sum(axis), paired=True, vectorized=True,
            n_resamples=resamples, method="percentile", random_state=np.random.default_rng(10 + g),
        ).confidence_interval  # fmt: skip
        assert ours[group]["recall@20"]["ci95"] == pytest.approx([ref.low, ref.high], abs=0.012)
        ref_lift = stats.bootstrap(
            (a.groups.rr[:, column], b.groups.rr[:, column]), lambda x, y, axis: x.sum(axis) / y.sum(axis) - 1.0,
            paired=True, vectorized=True, n_resamples=resamples, method="percentile", random_state=np.random.default_rng(20 + g),
        ).confidence_interval  # fmt: skip
        width = ref_lift.high - ref_lift.low
        assert lifts[group]["mrr@20"]["ci95"] == pytest.approx([ref_lift.low, ref_lift.high], abs=0.05 * width)
