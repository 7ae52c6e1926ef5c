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
from collections.abc import Sequence
from dataclasses import asdict, dataclass
from datetime import date, datetime, timezone
from pathlib import Path

import numpy as np

from service.errors import CairnError, InputDataError

FORMAT_VERSION = 1
CLICKS_FILE = "clicks.csv"
CATALOGUE_FILE = "catalogue.csv"
SCENARIO_FILE = "scenario.npz"
CLICK_COLUMNS = ("session_id", "visitor_id", "item_id", "timestamp")
CATALOGUE_COLUMNS = ("item_id", "name", "category")
DAY_S = 86_400
MAX_SESSIONS = 25_000_000  # about 100M clicks at the default length: the sampler's memory bound
# A gap longer than this would split the visit under the usual 30-minute inactivity rule
# (common practice), so think times are capped just below it.
MAX_THINK_S = 1_500
# Share of visits starting in each hour of the day (UTC): quiet nights, a lunchtime bump and an
# evening peak, the usual shape of a consumer web shop's traffic (common practice).
HOURLY_TRAFFIC = (
    0.4, 0.25, 0.15, 0.1, 0.1, 0.2, 0.5, 1.0, 1.6, 2.0, 2.2, 2.4,
    2.8, 2.6, 2.3, 2.2, 2.3, 2.6, 3.2, 3.8, 4.0, 3.4, 2.2, 1.0,
)  # fmt: skip


class ScenarioError(CairnError):
    """A demo-scenario parameter that cannot be used (names the parameter and its value)."""


# --- catalogue ---------------------------------------------------------------------------------

# category -> (main products, their variants, follow-ups (accessories, consumables), their variants,
# share of the catalogue). Generic nouns only: no brands, no names of people.
_CATEGORIES: dict[str, tuple[tuple[str, ...], tuple[str, ...], tuple[str, ...], tuple[str, ...], float]] = {
    "seeds": (
        ("Tomato seeds", "Carrot seeds", "Lettuce seeds", "Sunflower seeds", "Basil seeds", "Bean seeds",
         "Pea seeds", "Courgette seeds", "Pumpkin seeds", "Chilli seeds", "Radish seeds", "Spinach seeds",
         "Beetroot seeds", "Wildflower seed mix", "Lawn seed", "Parsley seeds"),
        ("packet of 30", "packet of 50", "packet of 100", "packet of 250", "organic packet of 50",
         "heritage variety", "early variety", "dwarf variety", "climbing variety", "500 g", "1 kg"),
        ("Seed tray", "Plug tray", "Propagator lid", "Plant labels", "Dibber", "Seed tape", "Germination mat",
         "Sowing sieve", "Heated propagator", "Coir pellets"),
        ("pack of 5", "pack of 10", "pack of 24", "pack of 50", "24 cells", "40 cells", "60 cells",
         "small", "medium", "large", "recycled plastic", "wooden"),
        0.17,
    ),
    "bulbs": (
        ("Tulip bulbs", "Daffodil bulbs", "Crocus bulbs", "Allium bulbs", "Hyacinth bulbs", "Lily bulbs",
         "Dahlia tubers", "Gladiolus corms", "Snowdrop bulbs", "Iris bulbs", "Onion sets", "Garlic bulbs"),
        ("pack of 5", "pack of 10", "pack of 25", "pack of 50", "mixed colours", "white", "yellow", "red",
         "purple", "early flowering", "late flowering"),
        ("Bulb planter", "Bulb basket", "Bulb fibre", "Bone meal", "Plant markers", "Bulb storage net",
         "Bulb dusting powder", "Bulb crate"),
        ("small", "large", "long handle", "pack of 3", "pack of 10", "1 kg", "2 kg", "5 kg", "round",
         "square"),
        0.10,
    ),
    "tools": (
        ("Spade", "Garden fork", "Hand trowel", "Pruning shears", "Hedge shears", "Rake", "Hoe", "Loppers",
         "Wheelbarrow", "Leaf blower", "Lawn mower", "Grass trimmer", "Pruning saw"),
        ("small", "large", "stainless steel", "carbon steel", "ash handle", "telescopic", "ergonomic grip",
         "cordless", "lightweight", "heavy duty", "compact"),
        ("Gardening gloves", "Tool sharpener", "Tool hanger", "Replacement blade", "Trimmer line",
         "Kneeling pad", "Tool oil", "Leaf sack", "Grass box", "Spare battery"),
        ("size S", "size M", "size L", "size XL", "pack of 2", "pack of 3", "1.6 mm", "2.0 mm", "100 ml",
         "250 ml", "18 V", "36 V"),
        0.14,
    ),
    "pots": (
        ("Terracotta pot", "Glazed pot", "Plastic pot", "Window box", "Hanging basket", "Raised bed",
         "Trough planter", "Self-watering pot", "Fabric grow bag", "Wooden planter"),
        ("12 cm", "17 cm", "24 cm", "30 cm", "40 cm", "50 cm", "60 cm", "80 cm", "anthracite", "sand",
         "white", "round", "square"),
        ("Pot saucer", "Pot feet", "Basket liner", "Drainage crocks", "Pot trolley", "Planter liner",
         "Wall bracket", "Pot hanger"),
        ("12 cm", "17 cm", "24 cm", "30 cm", "40 cm", "50 cm", "set of 3", "set of 6", "terracotta",
         "black", "galvanised", "coir"),
        0.12,
    ),
    "irrigation": (
        ("Garden hose", "Hose reel", "Watering can", "Drip irrigation kit", "Sprinkler", "Rain barrel",
         "Water timer", "Soaker hose", "Pressure sprayer"),
        ("15 m", "20 m", "25 m", "30 m", "50 m", "5 l", "10 l", "200 l", "300 l", "wall-mounted", "mobile"),
        ("Hose connector", "Spray nozzle", "Hose clip", "Drip emitters", "Tap adaptor", "Barrel tap",
         "Sprinkler spike", "Timer battery pack", "Hose repair kit"),
        ("13 mm", "19 mm", "25 mm", "1/2 inch", "3/4 inch", "pack of 2", "pack of 10", "pack of 25",
         "brass", "plastic", "adjustable"),
        0.09,
    ),
    "soil and compost": (
        ("Multi-purpose compost", "Potting soil", "Topsoil", "Raised bed soil", "Seed compost",
         "Ericaceous compost", "Cactus soil", "Lawn dressing", "Bark mulch"),
        ("10 l", "20 l", "40 l", "50 l", "60 l", "70 l", "peat-free 40 l", "peat-free 60 l", "bulk bag",
         "3-pack"),
        ("Perlite", "Vermiculite", "Horticultural grit", "Clay pebbles", "Soil test kit", "Compost scoop",
         "Worm casts", "Compost accelerator", "Soil pH strips"),
        ("1 l", "5 l", "10 l", "20 l", "1 kg", "5 kg", "10 kg", "pack of 2", "pack of 20", "refill"),
        0.08,
    ),
    "furniture": (
        ("Garden bench", "Bistro set", "Lounge chair", "Garden table", "Parasol", "Hammock", "Folding chair",
         "Swing seat", "Sun lounger", "Storage box"),
        ("acacia", "teak-look", "steel", "aluminium", "rattan-look", "grey", "green", "natural",
         "2-seater", "3-seater", "foldable"),
        ("Seat cushion", "Furniture cover", "Parasol base", "Table cloth", "Furniture oil", "Hammock stand",
         "Cushion box", "Chair pad"),
        ("grey", "beige", "navy", "green", "striped", "round", "rectangular", "small", "large", "25 kg",
         "500 ml", "1 l"),
        0.11,
    ),
    "lighting": (
        ("Solar lantern", "String lights", "Path light", "Wall lantern", "Spotlight", "Fairy lights",
         "Post light", "Floodlight"),
        ("warm white", "cool white", "multicolour", "solar", "mains", "pack of 4", "pack of 10", "10 m",
         "20 m", "black", "stainless steel"),
        ("Spare bulb", "Ground spike", "Motion sensor", "Extension cable", "Rechargeable battery",
         "Outdoor timer plug", "Solar panel"),
        ("warm white", "cool white", "pack of 2", "pack of 4", "5 m", "10 m", "AA", "AAA", "12 V",
         "black", "grey"),
        0.07,
    ),
    "plant care": (
        ("Rose feed", "Tomato feed", "Lawn feed", "Slug pellets", "Plant support frame", "Fleece jacket",
         "Insect mesh", "Weed control fabric", "Greenhouse shelving", "Cold frame"),
        ("1 l", "2.5 l", "1 kg", "2.5 kg", "5 m", "10 m", "organic", "small", "large", "pack of 10",
         "pack of 20"),
        ("Plant ties", "Bamboo canes", "Garden twine", "Ground pegs", "Measuring cup", "Plant rings",
         "Spare cover", "Watering spike"),
        ("60 cm", "90 cm", "120 cm", "150 cm", "pack of 10", "pack of 20", "pack of 50", "50 m", "100 m",
         "jute", "green"),
        0.12,
    ),
}
# Past the plain noun-variant combinations (large catalogues), names take one of these too.
_EDITIONS = ("value pack", "twin pack", "premium", "eco range", "trade pack", "starter set")
# Follow-ups mostly come from the same category; these are where the others come from.
_RELATED: dict[str, tuple[str, ...]] = {
    "seeds": ("soil and compost", "pots"),
    "bulbs": ("soil and compost", "plant care"),
    "tools": ("plant care",),
    "pots": ("soil and compost", "plant care"),
    "irrigation": ("tools", "pots"),
    "soil and compost": ("plant care", "pots"),
    "furniture": ("lighting",),
    "lighting": ("furniture",),
    "plant care": ("tools", "soil and compost"),
}
CATEGORIES: tuple[str, ...] = tuple(_CATEGORIES)
_OWN_CATEGORY_FOLLOW_SHARE = 0.7  # share of a main product's follow-ups from its own category


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


# --- parameters --------------------------------------------------------------------------------


@dataclass(frozen=True)
class ScenarioParams:
    seed: int = 7
    sessions: int = 80_000  # before --scale
    scale: float = 1.0  # multiplies the number of sessions
    items: int = 3_000  # catalogue size
    intents: int = 16  # latent shopping intents
    intent_persistence: float = 0.85  # P(intent unchanged from one click to the next)
    follow_prob: float = 0.30  # P(next click follows a link of the last item), when it has links
    reclick_prob: float = 0.10  # P(next click returns to an earlier item), when there is one
    stop_prob: float = 0.25  # P(session ends after each click): mean length 1 / stop_prob
    popularity_exponent: float = 1.0  # Zipf exponent of item popularity within a category
    intent_taste: float = 1.8  # log-normal spread of each intent's own liking of items
    intent_categories: int = 2  # categories each intent favours
    background_share: float = 0.05  # share of an intent's draws from shop-wide popularity
    followups_min: int = 2  # follow-up links per main product, uniform in [min, max]
    followups_max: int = 5
    main_share: float = 0.4  # share of items that are main products (the rest are follow-ups)
    days: int = 14
    start_date: str = "2024-04-01"  # first day (UTC)
    think_time_median: float = 40.0  # seconds between clicks, log-normal median
    think_time_spread: float = 0.9  # log-normal sigma of the think time
    sessions_per_visitor: float = 1.5  # mean visits per visitor (on distinct days)

    @property
    def n_sessions(self) -> int:
        return max(1, round(self.sessions * self.scale))

    def start_epoch(self) -> int:
        d = date.fromisoformat(self.start_date)
        return int(datetime(d.year, d.month, d.day, tzinfo=timezone.utc).timestamp())

    def validate(self) -> None:
        def bad(name: str, why: str) -> ScenarioError:
            return ScenarioError(f"{name.replace('_', '-')}={getattr(self, name)!r}: {why}")

        if self.sessions < 1:
            raise bad("sessions", "must be at least 1")
        if not (self.scale > 0 and np.isfinite(self.scale)):
            raise bad("scale", "must be a positive number")
        if self.n_sessions > MAX_SESSIONS:
            raise ScenarioError(
                f"sessions={self.sessions} x scale={self.scale} is {self.n_sessions:,} sessions; at most {MAX_SESSIONS:,}"
            )
        if self.items < 2 * len(CATEGORIES):
            raise bad("items", f"must be at least {2 * len(CATEGORIES)} (two per category)")
        if self.items > 9_999_999:
            raise bad("items", "must be below 10 million")
        if self.intents < 1:
            raise bad("intents", "must be at least 1")
        for name in ("intent_persistence", "follow_prob", "reclick_prob", "background_share"):
            if not 0.0 <= getattr(self, name) <= 1.0:
                raise bad(name, "must be a probability in [0, 1]")
        if self.follow_prob + self.reclick_prob > 1.0:
            raise ScenarioError(
                f"follow-prob={self.follow_prob} + reclick-prob={self.reclick_prob} exceeds 1"
            )
        if not 0.0 < self.stop_prob <= 1.0:
            raise bad("stop_prob", "must be in (0, 1]")
        if self.popularity_exponent < 0:
            raise bad("popularity_exponent", "must be >= 0")
        if self.intent_taste < 0:
            raise bad("intent_taste", "must be >= 0")
        if not 1 <= self.intent_categories <= len(CATEGORIES):
            raise bad("intent_categories", f"must be in 1..{len(CATEGORIES)}")
        if self.followups_min < 0:
            raise bad("followups_min", "must be >= 0")
        if self.followups_max < self.followups_min:
            raise bad("followups_max", f"must be >= followups-min={self.followups_min}")
        if not 0.0 < self.main_share < 1.0:
            raise bad("main_share", "must be in (0, 1)")
        if self.days < 1:
            raise bad("days", "must be at least 1")
        try:
            self.start_epoch()
        except ValueError:
            raise bad("start_date", "must be a date YYYY-MM-DD") from None
        if not self.think_time_median >= 1.0:
            raise bad("think_time_median", "must be at least 1 second")
        if self.think_time_spread < 0:
            raise bad("think_time_spread", "must be >= 0")
        if not self.sessions_per_visitor >= 1.0:
            raise bad("sessions_per_visitor", "must be at least 1")


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


def build_catalogue(params: ScenarioParams, rng: np.random.Generator) -> Catalogue:
    shares = np.array([c[4] for c in _CATEGORIES.values()])
    counts = 2 + np.floor(shares / shares.sum() * (params.items - 2 * len(CATEGORIES))).astype(np.int64)
    counts[np.argsort(-shares)[: params.items - counts.sum()]] += 1  # hand out the remainder
    names: list[str] = []
    cats: list[int] = []
    mains: list[bool] = []
    pops: list[np.ndarray] = []
    for c, (main_nouns, main_variants, follow_nouns, follow_variants, _) in enumerate(_CATEGORIES.values()):
        n_main = min(max(1, round(counts[c] * params.main_share)), counts[c] - 1)
        for nouns, variants, n, is_main in (
            (main_nouns, main_variants, n_main, True),
            (follow_nouns, follow_variants, counts[c] - n_main, False),
        ):
            plain = [f"{noun} {v}" for noun in nouns for v in variants]
            combos = [plain[j] for j in rng.permutation(len(plain))]
            if n > len(combos):
                more = [f"{p}, {e}" for p in plain for e in _EDITIONS]
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
        related = [CATEGORIES.index(r) for r in _RELATED[CATEGORIES[primary]]]
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
    for i in np.flatnonzero(catalogue.is_main):
        n_links = int(rng.integers(params.followups_min, params.followups_max + 1))
        if n_links == 0:
            continue
        own = cat == cat[i]
        rel = np.isin(cat, [CATEGORIES.index(r) for r in _RELATED[CATEGORIES[int(cat[i])]]])
        w = catalogue.popularity * followers * np.where(own, _OWN_CATEGORY_FOLLOW_SHARE, np.where(rel, 1 - _OWN_CATEGORY_FOLLOW_SHARE, 0.0))
        n_links = min(n_links, int((w > 0).sum()))
        picked = rng.choice(n, size=n_links, replace=False, p=w / w.sum())
        link_items[i, :n_links] = picked
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


# --- the demo log ------------------------------------------------------------------------------


@dataclass(frozen=True)
class DemoLog:
    catalogue: Catalogue
    scenario: Scenario
    cat_weights: np.ndarray  # float64 [K, n_categories]
    items: np.ndarray  # int32 [n_clicks], session order, time order within a session
    offsets: np.ndarray  # int64 [n_sessions + 1]
    times: np.ndarray  # int64 [n_clicks], epoch seconds
    session_ids: np.ndarray  # int64 [n_sessions], numbered by start time from 1
    visitors: np.ndarray  # int64 [n_sessions]

    @property
    def n_sessions(self) -> int:
        return len(self.offsets) - 1

    @property
    def n_clicks(self) -> int:
        return len(self.items)


def _visits(params: ScenarioParams, n_sessions: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Visitor and day of each session: a visitor's visits fall on consecutive distinct days."""
    mean_extra = params.sessions_per_visitor - 1
    per_visitor: list[np.ndarray] = []
    total = 0
    while total < n_sessions:
        # visits per visitor: 1 + geometric extra visits with the requested mean, at most one a day
        batch = max(1024, int((n_sessions - total) / params.sessions_per_visitor) + 1)
        extra = rng.geometric(1 / (1 + mean_extra), batch) - 1 if mean_extra > 0 else np.zeros(batch, np.int64)
        k = np.minimum(1 + extra, params.days)
        per_visitor.append(k)
        total += int(k.sum())
    counts = np.concatenate(per_visitor)
    counts = counts[: int(np.searchsorted(np.cumsum(counts), n_sessions)) + 1]
    counts[-1] -= int(counts.sum()) - n_sessions
    visitor = np.repeat(np.arange(len(counts)), counts)
    nth = np.arange(n_sessions) - np.repeat(np.cumsum(counts) - counts, counts)  # visit number 0..k-1
    day0 = rng.integers(0, params.days, len(counts))
    day = (np.repeat(day0, counts) + nth) % params.days
    # Shuffle which visitor owns which session slot: session order carries no meaning.
    perm = rng.permutation(n_sessions)
    return visitor[perm], day[perm]


def generate(params: ScenarioParams) -> DemoLog:
    params.validate()
    rng = np.random.default_rng(params.seed)
    catalogue = build_catalogue(params, rng)
    scenario, cat_weights = build_scenario(params, rng, catalogue)
    n_sessions = params.n_sessions
    lengths = rng.geometric(params.stop_prob, n_sessions).astype(np.int64)
    items = simulate(scenario, lengths, rng)
    offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)

    visitors, day = _visits(params, n_sessions, rng)
    hourly = np.array(HOURLY_TRAFFIC)
    hour = rng.choice(24, size=n_sessions, p=hourly / hourly.sum())
    start = params.start_epoch() + day * DAY_S + hour * 3600 + rng.integers(0, 3600, n_sessions)  # [S]
    think = np.exp(np.log(params.think_time_median) + params.think_time_spread * rng.standard_normal(len(items)))
    gaps = np.clip(np.ceil(think), 1, MAX_THINK_S).astype(np.int64)  # [n_clicks], >= 1 s: strict order
    gaps[offsets[:-1]] = 0  # a session's first click is at its start
    elapsed = np.cumsum(gaps)
    elapsed -= np.repeat(elapsed[offsets[:-1]], lengths)  # cumulative within each session
    # A visit that would run past midnight starts earlier instead: no session straddles two days,
    # so the ingest's day-based split never cuts one and the log ends on its last configured day.
    day_end = params.start_epoch() + (day + 1) * DAY_S - 1
    overrun = np.maximum(0, start + elapsed[offsets[1:] - 1] - day_end)
    start = np.maximum(start - overrun, day_end + 1 - DAY_S)
    times = np.repeat(start, lengths) + elapsed

    session_ids = np.empty(n_sessions, dtype=np.int64)
    session_ids[np.argsort(start, kind="stable")] = np.arange(1, n_sessions + 1)
    return DemoLog(catalogue, scenario, cat_weights, items, offsets, times, session_ids, visitors)


def write_demo(log: DemoLog, out: Path, params: ScenarioParams) -> None:
    """clicks.csv (rows in time order, as a shop's log would be), catalogue.csv, scenario.npz."""
    import polars as pl  # offline-only dependency, imported where it is used

    out = Path(out)
    if out.exists() and not out.is_dir():
        raise ScenarioError(f"out={str(out)!r}: exists and is not a folder")
    out.mkdir(parents=True, exist_ok=True)
    lengths = np.diff(log.offsets)
    order = np.argsort(log.times, kind="stable")  # a session's clicks stay in order (strictly later)
    session_of = np.repeat(np.arange(log.n_sessions), lengths)[order]
    width = max(7, len(str(int(log.visitors.max(initial=0)))))
    ids = pl.Series("item_id", log.catalogue.item_ids, dtype=pl.String)
    clicks = pl.DataFrame(
        {
            "session_id": log.session_ids[session_of],
            "visitor": log.visitors[session_of],
            "item_id": ids.gather(log.items[order]),
            "timestamp": log.times[order],
        }
    ).select(
        "session_id",
        pl.concat_str(pl.lit("v"), pl.col("visitor").cast(pl.String).str.zfill(width)).alias("visitor_id"),
        "item_id",
        "timestamp",
    )
    clicks.write_csv(out / CLICKS_FILE)
    pl.DataFrame(
        {
            "item_id": log.catalogue.item_ids,
            "name": log.catalogue.names,
            "category": [CATEGORIES[c] for c in log.catalogue.categories],
        }
    ).write_csv(out / CATALOGUE_FILE)
    log.scenario.save(
        out / SCENARIO_FILE,
        extra={
            "categories": np.array(CATEGORIES),
            "item_categories": log.catalogue.categories,
            "intent_category_weights": log.cat_weights,
            "item_popularity": log.catalogue.popularity,
            "stop_prob": np.array(params.stop_prob),
        },
        params=asdict(params),
    )


def summary(log: DemoLog, params: ScenarioParams) -> str:
    lengths = np.diff(log.offsets)
    first = datetime.fromtimestamp(int(log.times.min()), tz=timezone.utc).strftime("%Y-%m-%d")
    last = datetime.fromtimestamp(int(log.times.max()), tz=timezone.utc).strftime("%Y-%m-%d")
    single = int((lengths == 1).sum())
    return (
        f"Garden-shop demo: {log.n_sessions:,} sessions with {log.n_clicks:,} clicks "
        f"(mean length {lengths.mean():.2f}; {single:,} single-click sessions, which the ingest drops, "
        f"leave a mean of {lengths[lengths > 1].mean() if (lengths > 1).any() else 0:.2f}) "
        f"over {params.days} days from {first} to {last}, {log.catalogue.n_items:,} items in "
        f"{len(CATEGORIES)} categories, {params.intents} shopping intents, seed {params.seed}."
    )
