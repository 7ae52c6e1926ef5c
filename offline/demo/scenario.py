"""The demo shop: a garden-supply web shop whose visitors follow a known stochastic process.

Because the process is known, the exact next-click distribution of any session prefix is known
too, and the oracle that computes it is the ceiling every recommender is measured against.

The process, per session (a latent-intent model with item-level jumps):

    z_1 ~ prior                               latent shopping intent, one of K
    x_1 ~ intent_items[z_1]                   first click from the intent's item distribution
    for t = 2 .. length:
        z_t ~ transition[z_{t-1}]             the intent persists with high probability
        branch, with probabilities depending only on the history:
          follow   f  if x_{t-1} has follow-up links, else 0:   x_t ~ links of x_{t-1}
          re-click r  if an earlier item other than x_{t-1} was seen, else 0:
                                              x_t uniform over those distinct earlier items
          intent   1 - (the two above):       x_t ~ intent_items[z_t]
    length ~ Geometric(stop_prob), independent of the clicks

Only the intent branch depends on z, so the emission of a click given the intent is the whole
mixture; forward filtering over z (the HMM forward recursion, with history-dependent emissions)
gives the exact predictive distribution. The sampler draws many sessions per numpy call, one click
position at a time, so tens of millions of clicks take seconds.
"""
from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from service.errors import InputDataError
from offline.demo.catalogue import Catalogue
from offline.demo.params import FORMAT_VERSION, ScenarioParams
from offline.demo.products import CATEGORIES, OWN_CATEGORY_FOLLOW_SHARE, RELATED

# --- the process -------------------------------------------------------------------------------


@dataclass(frozen=True)
class Scenario:
    """Everything that defines the next-click process (and nothing about time or visitors)."""

    item_ids: list[str]
    prior: np.ndarray  # float64 [K], intent of the first click
    transition: np.ndarray  # float64 [K, K], row = intent at t-1, column = intent at t
    intent_items: np.ndarray  # float64 [K, n_items], each row sums to 1
    link_items: np.ndarray  # int64 [n_items, M], follow-up item indices, -1 = no link
    link_probs: np.ndarray  # float64 [n_items, M], each row sums to 1 where the item has links, else 0
    follow_prob: float
    reclick_prob: float

    def __post_init__(self) -> None:
        k, n = self.intent_items.shape
        tol = 1e-9
        problems = []
        if len(self.item_ids) != n:
            problems.append(f"{len(self.item_ids)} item ids for {n} items")
        if self.prior.shape != (k,) or abs(self.prior.sum() - 1) > tol or (self.prior < 0).any():
            problems.append("prior is not a distribution over the intents")
        if self.transition.shape != (k, k) or np.abs(self.transition.sum(1) - 1).max() > tol:
            problems.append("transition rows do not sum to 1")
        if (self.intent_items < 0).any() or np.abs(self.intent_items.sum(1) - 1).max() > tol:
            problems.append("intent item rows do not sum to 1")
        if self.link_items.shape != self.link_probs.shape or self.link_items.shape[0] != n:
            problems.append("link tables do not match the items")
        elif self.link_items.size:
            has = (self.link_items >= 0).any(1)
            sums = self.link_probs.sum(1)
            if np.abs(sums[has] - 1).max(initial=0) > tol or np.abs(sums[~has]).max(initial=0) > tol:
                problems.append("link probabilities of an item do not sum to 1")
            if (self.link_items >= n).any() or ((self.link_items < 0) & (self.link_probs != 0)).any():
                problems.append("link table points outside the catalogue")
        if not (0 <= self.follow_prob and 0 <= self.reclick_prob and self.follow_prob + self.reclick_prob <= 1):
            problems.append(f"follow_prob={self.follow_prob}, reclick_prob={self.reclick_prob} are not branch probabilities")
        if problems:
            raise InputDataError("invalid scenario: " + "; ".join(problems))

    @property
    def n_items(self) -> int:
        return len(self.item_ids)

    @property
    def n_intents(self) -> int:
        return len(self.prior)

    def has_links(self) -> np.ndarray:
        return (self.link_items >= 0).any(1)  # bool [n_items]

    def save(self, path: Path, extra: dict[str, np.ndarray] | None = None, params: dict | None = None) -> None:
        np.savez_compressed(
            path,
            format_version=np.array(FORMAT_VERSION),
            item_ids=np.array(self.item_ids),
            prior=self.prior,
            transition=self.transition,
            intent_items=self.intent_items,
            link_items=self.link_items,
            link_probs=self.link_probs,
            follow_prob=np.array(self.follow_prob),
            reclick_prob=np.array(self.reclick_prob),
            params_json=np.array(json.dumps(params or {})),
            **(extra or {}),
        )

    @staticmethod
    def load(path: Path) -> "Scenario":
        path = Path(path)
        if not path.is_file():
            raise InputDataError(f"{path}: no scenario file here (write one with `cairn demo-data`)")
        try:
            with np.load(path, allow_pickle=False) as z:
                version = int(z["format_version"])
                if version != FORMAT_VERSION:
                    raise InputDataError(f"{path}: scenario format {version}, this cairn reads {FORMAT_VERSION}")
                return Scenario(
                    item_ids=[str(s) for s in z["item_ids"]],
                    prior=z["prior"].astype(np.float64),
                    transition=z["transition"].astype(np.float64),
                    intent_items=z["intent_items"].astype(np.float64),
                    link_items=z["link_items"].astype(np.int64),
                    link_probs=z["link_probs"].astype(np.float64),
                    follow_prob=float(z["follow_prob"]),
                    reclick_prob=float(z["reclick_prob"]),
                )
        except (KeyError, ValueError, OSError) as exc:
            raise InputDataError(f"{path}: not a readable scenario file ({exc})") from exc


def build_scenario(params: ScenarioParams, rng: np.random.Generator, catalogue: Catalogue) -> tuple[Scenario, np.ndarray]:
    """Draw intents, their item distributions and the follow-up links. Returns the scenario and
    each intent's category weights, float64 [K, n_categories] (saved for inspection)."""
    n, k, n_cat = catalogue.n_items, params.intents, len(CATEGORIES)
    cat = catalogue.categories
    cat_share = np.bincount(cat, minlength=n_cat) / n

    # Each intent favours a primary category (categories taken in turn, so all are covered) and a
    # few others, preferring the related ones.
    first = rng.permutation(n_cat)
    cat_weights = np.zeros((k, n_cat))
    for z in range(k):
        primary = int(first[z % n_cat])
        related = [CATEGORIES.index(r) for r in RELATED[CATEGORIES[primary]]]
        others = [c for c in range(n_cat) if c != primary]
        pref = np.array([3.0 if c in related else 1.0 for c in others])
        chosen = rng.choice(others, size=params.intent_categories - 1, replace=False, p=pref / pref.sum())
        w = rng.dirichlet(20 * np.array([0.6, 0.25, 0.15, 0.1, 0.1, 0.1, 0.1, 0.1, 0.1][: params.intent_categories]))
        cat_weights[z, [primary, *chosen]] = np.sort(w)[::-1]
    prior = rng.dirichlet(np.full(k, 3.0))

    # Item distribution of an intent: popularity x the intent's own taste, within each favoured
    # category, plus a little shop-wide popularity so that no item is impossible.
    taste = np.exp(params.intent_taste * rng.standard_normal((k, n)))  # [K, n]
    liked = catalogue.popularity[None, :] * taste  # [K, n]
    within = np.zeros((k, n_cat))  # per-intent normaliser of each category
    for c in range(n_cat):
        within[:, c] = liked[:, cat == c].sum(1)
    intent_items = cat_weights[:, cat] * liked / within[:, cat]  # [K, n]
    shop_wide = catalogue.popularity * cat_share[cat]  # [n]
    intent_items = (1 - params.background_share) * intent_items + params.background_share * shop_wide[None, :]
    intent_items /= intent_items.sum(1, keepdims=True)

    # Switching: to another intent, likelier to one sharing categories with the current one.
    overlap = np.minimum(cat_weights[:, None, :], cat_weights[None, :, :]).sum(2)  # [K, K]
    switch = prior[None, :] * (0.2 + overlap)
    np.fill_diagonal(switch, 0.0)
    if k > 1:
        switch /= switch.sum(1, keepdims=True)
        transition = params.intent_persistence * np.eye(k) + (1 - params.intent_persistence) * switch
    else:
        transition = np.ones((1, 1))

    # Follow-up links: main product -> accessories or consumables, picked by their popularity.
    m = params.followups_max
    link_items = np.full((n, max(m, 1)), -1, dtype=np.int64)
    link_probs = np.zeros((n, max(m, 1)))
    followers = ~catalogue.is_main
    # The follow-up distribution depends on the main item's category only: made once per category
    # (per item it made the catalogue's build quadratic: hours at a million items).
    follow: dict[int, _DistinctDraws] = {}
    for i in np.flatnonzero(catalogue.is_main):
        n_links = int(rng.integers(params.followups_min, params.followups_max + 1))
        if n_links == 0:
            continue
        c = int(cat[i])
        if c not in follow:
            own = cat == c
            rel = np.isin(cat, [CATEGORIES.index(r) for r in RELATED[CATEGORIES[c]]])
            w = catalogue.popularity * followers * np.where(own, OWN_CATEGORY_FOLLOW_SHARE, np.where(rel, 1 - OWN_CATEGORY_FOLLOW_SHARE, 0.0))
            follow[c] = _DistinctDraws(w / w.sum())
        n_links = min(n_links, follow[c].support)
        link_items[i, :n_links] = follow[c].draw(rng, n_links)
        link_probs[i, :n_links] = np.sort(rng.dirichlet(np.ones(n_links)))[::-1]
    scenario = Scenario(
        item_ids=catalogue.item_ids,
        prior=prior,
        transition=transition,
        intent_items=intent_items,
        link_items=link_items,
        link_probs=link_probs,
        follow_prob=params.follow_prob,
        reclick_prob=params.reclick_prob,
    )
    return scenario, cat_weights


# --- sampling ----------------------------------------------------------------------------------


class _DistinctDraws:
    """`size` distinct indices drawn with probabilities `p`, many times from one distribution.

    The rounds of numpy's `Generator.choice(n, size, replace=False, p=p)`: draw the missing number
    by the cumulative distribution, keep the new distinct ones in order of first appearance, and
    redraw the rest with the found ones' probability set to 0. So a seed draws what that call draws
    (checked against it in tests/offline/demo), but the first round's cumulative distribution, all
    that a draw of a few items from many needs, is made once instead of at every call.
    """

    def __init__(self, p: np.ndarray) -> None:
        self.p = p
        self.support = int(np.count_nonzero(p > 0))
        self._cdf = np.cumsum(p)
        self._cdf /= self._cdf[-1]

    def draw(self, rng: np.random.Generator, size: int) -> np.ndarray:
        if size > self.support:
            raise ValueError(f"{size} distinct draws from {self.support} items with a chance")
        found = np.empty(0, dtype=np.int64)
        cdf = self._cdf
        while len(found) < size:
            x = rng.random(size - len(found))
            if len(found):
                p = self.p.copy()
                p[found] = 0
                cdf = np.cumsum(p)
                cdf /= cdf[-1]
            new = cdf.searchsorted(x, side="right")
            _, first = np.unique(new, return_index=True)
            found = np.concatenate([found, new[np.sort(first)]])
        return found


class _RowSampler:
    """Draw one index per row from many categorical distributions in one `searchsorted`.

    Row r's CDF is shifted by r, so that all rows form one increasing array and a draw for row r
    is a search for r + u, u ~ U[0, 1).
    """

    def __init__(self, probs: np.ndarray) -> None:  # probs: float64 [R, C]
        cdf = np.cumsum(probs, axis=1)
        cdf /= np.where(cdf[:, -1:] > 0, cdf[:, -1:], 1.0)
        cdf[:, -1] = 1.0
        self.width = probs.shape[1]
        self.flat = (cdf + np.arange(len(probs))[:, None]).ravel()  # [R * C]

    def draw(self, rows: np.ndarray, u: np.ndarray) -> np.ndarray:
        idx = np.searchsorted(self.flat, rows + u, side="right") - rows * self.width
        return np.minimum(idx, self.width - 1)  # guards u rounding up to 1


_CHUNK_SESSIONS = 200_000  # sessions simulated side by side; bounds the history matrix's memory


def simulate(scenario: Scenario, lengths: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Click items of sessions with the given lengths, concatenated in session order (int32)."""
    lengths = np.asarray(lengths, dtype=np.int64)
    out = np.empty(int(lengths.sum()), dtype=np.int32)
    offsets = np.concatenate([[0], np.cumsum(lengths)])
    first = _RowSampler(scenario.prior[None, :])
    switch = _RowSampler(scenario.transition)
    by_intent = _RowSampler(scenario.intent_items)
    by_link = _RowSampler(np.where(scenario.has_links()[:, None], scenario.link_probs, 1.0))
    has_links = scenario.has_links()
    f, r = scenario.follow_prob, scenario.reclick_prob
    for start in range(0, len(lengths), _CHUNK_SESSIONS):
        chunk_len = lengths[start : start + _CHUNK_SESSIONS]
        order = np.argsort(-chunk_len, kind="stable")  # longest first: active rows are a prefix
        lens = chunk_len[order]
        n, width = len(lens), int(lens[0]) if len(lens) else 0
        if width == 0:
            continue
        hist = np.zeros((n, width), dtype=np.int64)  # clicks so far, sorted session order
        fresh = np.zeros((n, width), dtype=bool)  # first occurrence of an item in its session
        z = first.draw(np.zeros(n, dtype=np.int64), rng.random(n))  # [n]
        hist[:, 0] = by_intent.draw(z, rng.random(n))
        fresh[:, 0] = True
        for t in range(1, width):
            m = int(np.searchsorted(-lens, -t, side="left"))  # rows with length > t
            z = switch.draw(z[:m], rng.random(m))
            last = hist[:m, t - 1]
            before = hist[:m, :t]  # [m, t]
            back = fresh[:m, :t] & (before != last[:, None])  # distinct earlier items, not the last
            n_back = back.sum(1)
            p_follow = f * has_links[last]
            p_back = r * (n_back > 0)
            u = rng.random(m)
            x = by_intent.draw(z, rng.random(m))
            follow = u < p_follow
            src = last[follow]
            x[follow] = scenario.link_items[src, by_link.draw(src, rng.random(len(src)))]
            reclick = ~follow & (u < p_follow + p_back)
            rows = np.flatnonzero(reclick)
            pick = np.floor(rng.random(len(rows)) * n_back[rows]).astype(np.int64)  # 0 .. n_back-1
            pos = (np.cumsum(back[rows], axis=1) > pick[:, None]).argmax(1)
            x[rows] = before[rows, pos]
            hist[:m, t] = x
            fresh[:m, t] = (before != x[:, None]).all(1)
        # Back to the caller's session order, then row-major flattening of the valid positions.
        restored = np.empty_like(hist)
        restored[order] = hist
        valid = np.arange(width)[None, :] < chunk_len[:, None]
        out[offsets[start] : offsets[start + len(chunk_len)]] = restored[valid]
    return out


