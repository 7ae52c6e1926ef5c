"""The demo shop's knobs (ScenarioParams) and the fixed facts of its log: file names, columns, traffic."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, datetime, timezone

import numpy as np

from service.errors import ScenarioError
from offline.demo.products import CATEGORIES

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


