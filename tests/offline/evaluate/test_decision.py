"""The verdict: a win only when the lift's whole interval is above zero and the p99 fits the budget."""

from __future__ import annotations

import numpy as np
import pytest

from offline.data.dataset import SessionSplit
from offline.evaluate.decision import decide
from offline.evaluate.evaluation import evaluate
from offline.evaluate.serving_cost import ClickCost, measure, scorer_clicker


class Table:
    def __init__(self, table: np.ndarray, name: str) -> None:
        self.table, self.n_items, self.name = table.astype(np.float32), table.shape[0], name

    def begin(self, n: int) -> None:
        pass

    def advance(self, items: np.ndarray) -> np.ndarray:
        return self.table[items]


N = 40


def split(seed: int) -> SessionSplit:
    rng = np.random.default_rng(seed)
    sessions = []
    for _ in range(300):
        clicks = [int(rng.integers(N))]
        for _ in range(int(rng.integers(1, 6))):
            clicks.append((clicks[-1] + int(rng.integers(1, 3))) % N)
        sessions.append(clicks)
    return SessionSplit.from_sessions(sessions)


def results(gru_strength: float) -> dict:
    """session-knn scores the true next items a little; the GRU by `gru_strength` (same random base)."""
    test = split(1)
    rng = np.random.default_rng(2)
    base = rng.random((N, N))
    truth = np.zeros((N, N))
    for i in range(N):
        truth[i, [(i + 1) % N, (i + 2) % N]] = 1.0
    jitter = 0.05 * np.random.default_rng(3).random((N, N))  # the GRU's lists differ a little even at equal strength
    counts = np.ones(N)
    out = {}
    for name, strength, noise in (("session-knn", 0.15, 0.0), ("pop", 0.0, 0.0), ("gru-top1-max", gru_strength, 1.0)):
        out[name] = evaluate(Table(base + strength * truth + noise * jitter, name), test, (3, 20), popularity=counts, bootstrap=300)
    return out


def costs(gru_p99: float) -> dict:
    return {"session-knn": ClickCost(0.3, 0.8, 100, "service"), "pop": ClickCost(0.01, 0.02, 100, "service"),
            "gru-top1-max": ClickCost(1.0, gru_p99, 100, "scorer")}  # fmt: skip


def test_a_clear_win_that_fits_the_budget_serves_the_gru() -> None:
    v = decide(results(0.6), costs(3.0), budget_ms=25)
    assert v["best"] == "gru-top1-max" and v["strongest_simple"] == "session-knn"
    assert v["lift"]["recall@20"]["ci95"][0] > 0 and v["fits_budget"] is True
    assert v["added_p99_ms"] == pytest.approx(2.2)
    assert v["recommendation"].startswith("serve gru-top1-max:")


def test_a_clear_win_over_the_budget_serves_the_simple_one() -> None:
    v = decide(results(0.6), costs(40.0), budget_ms=25)
    assert v["fits_budget"] is False
    assert v["recommendation"].startswith("serve session-knn:") and "over the 25 ms budget" in v["recommendation"]


def test_a_lift_whose_interval_holds_zero_is_never_a_win() -> None:
    v = decide(results(0.14), costs(3.0), budget_ms=25)  # about the same strength: the lift is noise around 0
    lo, hi = v["lift"]["recall@20"]["ci95"]
    assert lo < 0 < hi and v["lift"]["recall@20"]["value"] != 0
    assert v["judgement"] == "inside the noise"
    assert v["recommendation"].startswith("serve session-knn:") and "inside the noise" in v["recommendation"]


def test_when_a_simple_one_is_best_the_gru_is_measured_against_it() -> None:
    v = decide(results(0.0), costs(3.0), budget_ms=25)
    assert v["best"] == "session-knn" and v["challenger"] == "gru-top1-max"
    assert v["lift"]["recall@20"]["ci95"][1] < 0 and v["recommendation"].startswith("serve session-knn:")


def test_cost_per_click_counts_every_click_after_the_warm_up() -> None:
    test = split(3)
    cost = measure(*scorer_clicker(Table(np.random.default_rng(0).random((N, N)), "t")), test, 50, "scorer")
    assert cost.clicks == 50 and 0 < cost.p50_ms <= cost.p99_ms


def test_an_unmeasured_cost_is_said_not_assumed() -> None:
    v = decide(results(0.6), {}, budget_ms=25)
    assert v["fits_budget"] is None and v["added_p99_ms"] is None
    assert "not measured" in v["recommendation"] and "not measured" in v["lines"][2]
