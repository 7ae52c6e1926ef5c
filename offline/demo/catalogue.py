"""The garden shop's catalogue: item ids, generated names in categories, popularity, follow-up links."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from offline.demo.params import ScenarioParams
from offline.demo.products import CATEGORIES, EDITIONS, PRODUCTS


@dataclass(frozen=True)
class Catalogue:
    item_ids: list[str]  # "GS-00042", index order
    names: list[str]
    categories: np.ndarray  # int64 [n_items], index into CATEGORIES
    is_main: np.ndarray  # bool [n_items]: main products carry follow-up links
    popularity: np.ndarray  # float64 [n_items], Zipf-like weight, sums to 1 within each category

    @property
    def n_items(self) -> int:
        return len(self.item_ids)


def item_id(index: int, n_items: int) -> str:
    width = max(5, len(str(n_items - 1)))
    return f"GS-{index:0{width}d}"


def build_catalogue(params: ScenarioParams, rng: np.random.Generator) -> Catalogue:
    shares = np.array([c[4] for c in PRODUCTS.values()])
    counts = 2 + np.floor(shares / shares.sum() * (params.items - 2 * len(CATEGORIES))).astype(np.int64)
    counts[np.argsort(-shares)[: params.items - counts.sum()]] += 1  # hand out the remainder
    names: list[str] = []
    cats: list[int] = []
    mains: list[bool] = []
    pops: list[np.ndarray] = []
    for c, (main_nouns, main_variants, follow_nouns, follow_variants, _) in enumerate(PRODUCTS.values()):
        n_main = min(max(1, round(counts[c] * params.main_share)), counts[c] - 1)
        for nouns, variants, n, is_main in (
            (main_nouns, main_variants, n_main, True),
            (follow_nouns, follow_variants, counts[c] - n_main, False),
        ):
            plain = [f"{noun} {v}" for noun in nouns for v in variants]
            combos = [plain[j] for j in rng.permutation(len(plain))]
            if n > len(combos):
                more = [f"{p}, {e}" for p in plain for e in EDITIONS]
                combos += [more[j] for j in rng.permutation(len(more))]
            for j in range(n):
                series = j // len(combos)  # past every combination, start a numbered series
                base = combos[j % len(combos)]
                names.append(base if series == 0 else f"{base}, series {series + 1}")
            cats += [c] * n
            mains += [is_main] * n
        # Zipf-like popularity over a random ranking of the category's items.
        ranks = rng.permutation(counts[c]) + 1
        w = ranks.astype(np.float64) ** -params.popularity_exponent
        pops.append(w / w.sum())
    # Ids in a shuffled order, so that an id says nothing about the category.
    perm = rng.permutation(params.items)
    names_arr = np.array(names, dtype=object)[perm]
    return Catalogue(
        item_ids=[item_id(i, params.items) for i in range(params.items)],
        names=[str(s) for s in names_arr],
        categories=np.array(cats, dtype=np.int64)[perm],
        is_main=np.array(mains, dtype=bool)[perm],
        popularity=np.concatenate(pops)[perm],
    )


