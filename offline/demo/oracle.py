"""The exact next-click oracle: forward filtering over the latent intent gives the true
predictive distribution of any session prefix (the process is in offline/demo/scenario.py)."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import numpy as np

from service.errors import InputDataError
from offline.demo.scenario import Scenario

# --- the oracle --------------------------------------------------------------------------------


class _Filter:
    """Forward filter over the latent intent for a batch of sessions.

    Columns are an output item space: `columns[j]` is the scenario item of output column j; clicks
    arrive as column indices, so every clicked item is a column and the seen-set lives there.
    """

    def __init__(self, scenario: Scenario, columns: np.ndarray) -> None:
        self.s = scenario
        self.columns = columns  # int64 [n_out]
        self.column_of = np.full(scenario.n_items, -1, dtype=np.int64)
        self.column_of[columns] = np.arange(len(columns))
        self.intent_out = scenario.intent_items[:, columns]  # [K, n_out], prepared once
        self.has_links = scenario.has_links()
        self.link_cols = np.where(scenario.link_items >= 0, self.column_of[scenario.link_items], -1)  # [n, M]

    def begin(self, n: int) -> None:
        self.alpha = np.zeros((n, self.s.n_intents))  # P(z_t | x_1..t), rows sum to 1 once started
        self.seen = np.zeros((n, len(self.columns)), dtype=bool)
        self.n_seen = np.zeros(n, dtype=np.int64)  # distinct items seen
        self.last = np.full(n, -1, dtype=np.int64)  # last click, scenario index
        self.last_col = np.full(n, -1, dtype=np.int64)
        self.started = False

    def _branches(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Branch probabilities of the next click given the history: follow, re-click, intent."""
        p_follow = self.s.follow_prob * self.has_links[self.last]
        n_back = self.n_seen - 1  # distinct earlier items other than the last one
        p_back = self.s.reclick_prob * (n_back > 0)
        return p_follow, p_back, 1.0 - p_follow - p_back, np.maximum(n_back, 1)

    def observe(self, cols: np.ndarray) -> None:
        x = self.columns[cols]  # scenario items [n]
        rows = np.arange(len(cols))
        like = self.s.intent_items[:, x].T  # P(x | intent branch, z) [n, K]
        if not self.started:
            post = self.s.prior[None, :] * like  # [n, K]
        else:
            p_follow, p_back, p_intent, n_back = self._branches()
            link_p = (self.s.link_probs[self.last] * (self.s.link_items[self.last] == x[:, None])).sum(1)  # [n]
            back_p = (self.seen[rows, cols] & (cols != self.last_col)) / n_back  # [n]
            emit = (p_follow * link_p + p_back * back_p)[:, None] + p_intent[:, None] * like  # [n, K]
            post = (self.alpha @ self.s.transition) * emit  # [n, K]
        total = post.sum(1, keepdims=True)
        # A prefix the process cannot produce (e.g. with clicks removed by the ingest's filters)
        # keeps the previous belief instead of dividing by zero.
        self.alpha = np.where(total > 0, post / np.where(total > 0, total, 1.0), self.alpha if self.started else self.s.prior)
        self.n_seen += ~self.seen[rows, cols]
        self.seen[rows, cols] = True
        self.last, self.last_col = x, cols
        self.started = True

    def predict(self) -> np.ndarray:
        """P(next click = column j | history), float64 [n, n_out]."""
        p_follow, p_back, p_intent, n_back = self._branches()
        n = len(self.last)
        rows = np.arange(n)
        intent_next = self.alpha @ self.s.transition  # [n, K]
        out = p_intent[:, None] * (intent_next @ self.intent_out)  # [n, n_out]
        coef = p_back / n_back  # [n]
        out += coef[:, None] * self.seen
        out[rows, self.last_col] -= coef  # the last item is seen but not a re-click target
        link_cols = self.link_cols[self.last]  # [n, M]; distinct within a row, so += is safe
        ok = link_cols >= 0
        r_idx = np.broadcast_to(rows[:, None], link_cols.shape)
        out[r_idx[ok], link_cols[ok]] += (p_follow[:, None] * self.s.link_probs[self.last])[ok]
        return out


def next_click_distribution(scenario: Scenario, prefix: Sequence[int]) -> np.ndarray:
    """Exact P(next click = i | prefix) over all catalogue items, float64 [n_items].

    `prefix` holds scenario item indices; an empty prefix gives the first-click distribution.
    """
    if len(prefix) == 0:
        return scenario.prior @ scenario.intent_items
    filt = _Filter(scenario, np.arange(scenario.n_items))
    filt.begin(1)
    for item in prefix:
        filt.observe(np.array([int(item)]))
    return filt.predict()[0]


class ScenarioOracle:
    """`SessionScorer` giving the exact next-click probabilities over prepared item indices.

    Prepared index j stands for the scenario item with id `item_ids[j]`. The scores are the true
    probabilities of those items, not renormalised over the subset (ranking is unaffected).
    """

    name = "oracle"

    def __init__(self, scenario: Scenario, item_ids: Sequence[str]) -> None:
        index = {s: i for i, s in enumerate(scenario.item_ids)}
        unknown = [s for s in item_ids if s not in index]
        if unknown:
            raise InputDataError(
                f"item id {unknown[0]!r} is not in the scenario ({len(unknown)} unknown ids); "
                "the prepared data must come from this scenario's clicks.csv"
            )
        self.n_items = len(item_ids)
        self._filter = _Filter(scenario, np.array([index[s] for s in item_ids], dtype=np.int64))

    def begin(self, n_sessions: int) -> None:
        self._filter.begin(n_sessions)

    def advance(self, items: np.ndarray) -> np.ndarray:
        self._filter.observe(np.asarray(items, dtype=np.int64))
        return self._filter.predict().astype(np.float32)  # [n, n_items]


def load_oracle(path: Path, item_ids: list[str]) -> ScenarioOracle:
    return ScenarioOracle(Scenario.load(path), item_ids)


