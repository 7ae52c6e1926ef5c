"""Simulated visitors who respond to what they are shown, for online experiments on the demo shop.

Replaying a log cannot tell two models apart online: the next click is fixed by the log, whatever
was shown. The demo shop knows each visit's true next-click distribution p (offline/demo/oracle.py:
exact forward filtering over the latent intent), so a visitor here is a small click model on top:

- after each click the visit ends with probability `stop_prob` (the scenario's geometric length);
- otherwise the visitor looks at shown position r with probability e_r = first * decay^(r - 1)
  (a position-based examination model, Craswell et al., WSDM 2008; the numbers are ours) and takes
  the shown item i found there with probability e_r * p_i: how likely they are to look, times how
  likely they were to want it. Since the p_i sum to at most 1, so do these;
- with the remaining probability they go their own way: the next click is drawn from p itself.

So a list with the items the visitor is likeliest to want, near the top, gets more of its items
clicked, and the oracle's own top-k is the best list there is. The experiment's hit rate (the next
click was among those just shown) measures exactly that.

`run_visitors` drives any `shop(session_id, item_id) -> shown item ids`: `http_shop` posts to the
real service (each visit's arm is the service's business); tests may pass a shop of their own.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import httpx
import numpy as np

from offline.demo.oracle import ScenarioOracle
from offline.demo.scenario import Scenario

Shop = Callable[[str, str], list[str]]
EXAMINE_FIRST = 0.9
EXAMINE_DECAY = 0.8


def examination(count: int, first: float = EXAMINE_FIRST, decay: float = EXAMINE_DECAY) -> np.ndarray:
    return first * decay ** np.arange(count)


@dataclass
class VisitorStats:
    visits: int = 0
    clicks: int = 0
    took_shown: int = 0  # clicks on a shown item because it was shown (the visitor looked and wanted it)


class Visitors:
    def __init__(self, scenario: Scenario, stop_prob: float = 0.25, max_clicks: int = 30, seed: int = 0) -> None:
        self.scenario = scenario
        self.index = {s: i for i, s in enumerate(scenario.item_ids)}
        self.first = scenario.prior @ scenario.intent_items  # P(first click), [n_items]
        self.stop_prob = stop_prob
        self.max_clicks = max_clicks
        self.rng = np.random.default_rng(seed)
        self.stats = VisitorStats()

    def _draw(self, p: np.ndarray) -> int:
        return int(self.rng.choice(len(p), p=p / p.sum()))

    def next_click(self, p: np.ndarray, shown: list[str]) -> int:
        """The visitor's next click (scenario index) given the true distribution `p` and the shown list."""
        idx = np.array([self.index.get(s, -1) for s in shown], dtype=np.int64)
        known = idx >= 0
        want = np.where(known, p[np.maximum(idx, 0)], 0.0)
        take = examination(len(shown)) * want  # P(take the item at each position)
        u = self.rng.random()
        cumulative = np.cumsum(take)
        if len(take) and u < cumulative[-1]:
            self.stats.took_shown += 1
            return int(idx[int(np.searchsorted(cumulative, u, side="right"))])
        return self._draw(p)

    def visit(self, session_id: str, shop: Shop) -> int:
        """One visit through `shop`; returns its number of clicks."""
        oracle = ScenarioOracle(self.scenario, self.scenario.item_ids)
        oracle.begin(1)
        item = self._draw(self.first)
        clicks = 0
        while True:
            shown = shop(session_id, self.scenario.item_ids[item])
            clicks += 1
            p = oracle.advance(np.array([item]))[0].astype(np.float64)
            if clicks >= self.max_clicks or self.rng.random() < self.stop_prob or p.sum() <= 0:
                break
            item = self.next_click(p, shown)
        self.stats.visits += 1
        self.stats.clicks += clicks
        return clicks


def run_visitors(visitors: Visitors, shop: Shop, n_visits: int, prefix: str = "sim") -> VisitorStats:
    for v in range(n_visits):
        visitors.visit(f"{prefix}-{v}", shop)
    return visitors.stats


def http_shop(client: httpx.Client, count: int = 10) -> Shop:
    """Each click posted to the service (`client` has its base URL); the answer's items are what was shown."""

    def shop(session_id: str, item_id: str) -> list[str]:
        r = client.post(f"/v1/sessions/{session_id}/clicks", json={"item_id": item_id, "count": count})
        r.raise_for_status()
        return [i["item_id"] for i in r.json()["items"]]

    return shop
