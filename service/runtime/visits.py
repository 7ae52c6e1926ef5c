"""A click end to end, independent of HTTP: load the visit, advance the recommender, store, answer.

    load state -> map the item id (unknown: record it, answer from the neighbours of the visit's
    last known item or from popularity) -> advance the active recommender within the request's
    budget (too late or failed: the neighbour table) -> rank, without seen items when asked ->
    check-and-set the new state (lost the race: re-read and redo) -> answer

Clicks on one visit are serialised inside a process by a per-session lock, so they rarely race;
across workers and replicas the store's check-and-set makes sure none is lost. The GRU's hidden
state is trusted only when the model that produced it is the one serving now; otherwise the stored
clicks are replayed through the serving model first (a model switch loses no visit's context).
Nothing here logs item ids or hidden states.
"""

from __future__ import annotations

import asyncio
import logging
import time
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from dataclasses import dataclass, field

from service.errors import CairnError, StoreError
from service.runtime.active import ActiveModel, LoadedModel, ModelChoice
from service.runtime.recommenders import GruState, Ranking
from service.store.base import SessionStore
from service.store.state import SessionState, decode, encode, token_of

log = logging.getLogger("cairn.service")

MAX_ATTEMPTS = 32  # check-and-set rounds before a click gives up (each lost round means another click landed)
_NO_SEEN: frozenset[int] = frozenset()


@dataclass
class Timing:
    """Time spent per part of one request, for Server-Timing and the metrics."""

    started: float = field(default_factory=time.perf_counter)
    store_s: float = 0.0
    model_s: float = 0.0


@dataclass
class Answer:
    item_ids: list[str]
    scores: list[float]
    served_by: str  # gru | neighbours | popularity
    model_version: str  # "name/version" of the artifact that answered
    fallback_reason: str | None
    sequence: int  # clicks the visit has applied
    duplicate: bool = False


class _KeyedLocks:
    """One asyncio lock per session id, dropped when nobody holds or waits for it."""

    def __init__(self) -> None:
        self._locks: dict[str, tuple[asyncio.Lock, list[int]]] = {}

    @asynccontextmanager
    async def hold(self, key: str) -> AsyncIterator[None]:
        entry = self._locks.get(key)
        if entry is None:
            entry = self._locks[key] = (asyncio.Lock(), [0])
        entry[1][0] += 1
        try:
            async with entry[0]:
                yield
        finally:
            entry[1][0] -= 1
            if entry[1][0] == 0:
                del self._locks[key]


class Visits:
    def __init__(self, store: SessionStore, active: ActiveModel, history_length: int, event_memory: int) -> None:
        self.store = store
        self.active = active
        self.history_length = history_length
        self.event_memory = event_memory
        self._locks = _KeyedLocks()

    async def click(
        self,
        session_id: str,
        item_id: str,
        event_id: str | None,
        count: int,
        exclude_seen: bool,
        budget_s: float,
        timing: Timing,
    ) -> Answer:
        deadline = timing.started + budget_s
        try:
            async with self._locks.hold(session_id):
                for _ in range(MAX_ATTEMPTS):
                    raw = await self._load(session_id, timing)
                    state = self._decode(raw)
                    model, choice = self.active.current
                    if event_id is not None and state is not None and event_id in state.event_ids:
                        answer = await self._current(model, choice, state, count, exclude_seen, deadline, timing)
                        answer.duplicate = True
                        return answer
                    new_state, answer = await self._apply(model, choice, state, item_id, event_id, count, exclude_seen, deadline, timing)
                    if await self._save(session_id, new_state, token_of(raw), timing):
                        return answer
                raise StoreError(f"{MAX_ATTEMPTS} concurrent writes to one session in a row; click not recorded")
        except StoreError as exc:
            log.warning("session store unavailable, answering without the visit: %s", exc)
            model, choice = self.active.current
            index = model.index_of(item_id)
            seen = frozenset(model.known_indices((item_id,))) if exclude_seen else _NO_SEEN
            ranking, served_by = self._fallback(model, index, count, seen)
            return self._answer(model, ranking, served_by, "store_unavailable", 0)

    async def current(self, session_id: str, count: int, exclude_seen: bool, budget_s: float, timing: Timing) -> Answer:
        deadline = timing.started + budget_s
        model, choice = self.active.current
        try:
            state = self._decode(await self._load(session_id, timing))
        except StoreError as exc:
            log.warning("session store unavailable, answering without the visit: %s", exc)
            return self._answer(model, model.popularity.top(count), "popularity", "store_unavailable", 0)
        return await self._current(model, choice, state, count, exclude_seen, deadline, timing)

    async def forget(self, session_id: str, timing: Timing) -> None:
        t0 = time.perf_counter()
        try:
            await self.store.delete(session_id)
        finally:
            timing.store_s += time.perf_counter() - t0

    # -- the click path -------------------------------------------------------------------------

    async def _apply(
        self,
        model: LoadedModel,
        choice: ModelChoice,
        state: SessionState | None,
        item_id: str,
        event_id: str | None,
        count: int,
        exclude_seen: bool,
        deadline: float,
        timing: Timing,
    ) -> tuple[SessionState, Answer]:
        history = state.items if state is not None else ()
        index = model.index_of(item_id)
        seen = frozenset(model.known_indices((*history, item_id))) if exclude_seen else _NO_SEEN
        # What the new state keeps of the GRU: unchanged unless the GRU ran on this click.
        hidden = state.hidden if state is not None else None
        previous = state.previous_hidden if state is not None else None
        tag = state.model_tag if state is not None else None
        reason: str | None = None

        if index < 0:
            # The model never saw this id: the GRU skips it (as a replay would), the click is still kept.
            ranking, served_by = self._fallback(model, self._last_known(model, history), count, seen)
            reason = None if choice.recommender == "popularity" else "unknown_item"
        elif choice.recommender == "gru":
            gru_state = self._stored_gru_state(model, state)
            t0 = time.perf_counter()
            try:
                async with asyncio.timeout(deadline - t0 if deadline > t0 else 0.0):
                    if gru_state is None:
                        gru_state = await self._replay(model, history)
                    gru_state, ranking = await model.gru.step(gru_state, index, count, seen)
                served_by = "gru"
                hidden, previous, tag = gru_state.hidden.tobytes(), gru_state.previous.tobytes(), model.tag
            except (TimeoutError, CairnError) as exc:
                reason = "deadline" if isinstance(exc, TimeoutError) else "model_error"
                if reason == "model_error":
                    log.error("GRU step failed, answering from the neighbour table: %s", type(exc).__name__)
                ranking, served_by = self._fallback(model, index, count, seen)
                hidden = previous = tag = None  # the next request rebuilds the state by replay
            finally:
                timing.model_s += time.perf_counter() - t0
        else:
            ranking, served_by = self._fallback(model, index if choice.recommender == "neighbours" else -1, count, seen)
            hidden = previous = tag = None  # the GRU did not see this click

        events = state.event_ids if state is not None else ()
        if event_id is not None and self.event_memory:
            events = (*events, event_id)[-self.event_memory :]
        new_state = SessionState(
            items=(*history, item_id)[-self.history_length :],
            hidden=hidden,
            previous_hidden=previous,
            model_tag=tag,
            sequence=(state.sequence if state is not None else 0) + 1,
            event_ids=events,
            last_seen=time.time(),
            **({"nonce": state.nonce} if state is not None else {}),
        )
        return new_state, self._answer(model, ranking, served_by, reason, new_state.sequence)

    # -- the current list, without a click ------------------------------------------------------

    async def _current(
        self,
        model: LoadedModel,
        choice: ModelChoice,
        state: SessionState | None,
        count: int,
        exclude_seen: bool,
        deadline: float,
        timing: Timing,
    ) -> Answer:
        if state is None or not state.items:
            reason = None if choice.recommender == "popularity" else "no_history"
            return self._answer(model, model.popularity.top(count), "popularity", reason, 0 if state is None else state.sequence)
        seen = frozenset(model.known_indices(state.items)) if exclude_seen else _NO_SEEN
        last = model.index_of(state.items[-1])
        if last < 0:
            ranking, served_by = self._fallback(model, self._last_known(model, state.items), count, seen)
            reason = None if choice.recommender == "popularity" else "unknown_item"
            return self._answer(model, ranking, served_by, reason, state.sequence)
        if choice.recommender != "gru":
            ranking, served_by = self._fallback(model, last if choice.recommender == "neighbours" else -1, count, seen)
            return self._answer(model, ranking, served_by, None, state.sequence)
        stored = self._stored_gru_state(model, state)
        t0 = time.perf_counter()
        try:
            async with asyncio.timeout(deadline - t0 if deadline > t0 else 0.0):
                if stored is None or stored.previous is None:
                    gru_state = await self._replay(model, state.items)
                else:
                    gru_state = GruState(stored.hidden, stored.previous, last)
                ranking = await model.gru.rank(gru_state, count, seen)
            return self._answer(model, ranking, "gru", None, state.sequence)
        except (TimeoutError, CairnError) as exc:
            reason = "deadline" if isinstance(exc, TimeoutError) else "model_error"
            if reason == "model_error":
                log.error("GRU step failed, answering from the neighbour table: %s", type(exc).__name__)
            ranking, served_by = self._fallback(model, last, count, seen)
            return self._answer(model, ranking, served_by, reason, state.sequence)
        finally:
            timing.model_s += time.perf_counter() - t0

    # -- helpers --------------------------------------------------------------------------------

    async def _load(self, session_id: str, timing: Timing) -> bytes | None:
        t0 = time.perf_counter()
        try:
            return await self.store.load(session_id)
        finally:
            timing.store_s += time.perf_counter() - t0

    async def _save(self, session_id: str, state: SessionState, expected: bytes, timing: Timing) -> bool:
        value = encode(state)
        t0 = time.perf_counter()
        try:
            return await self.store.save(session_id, value, expected)
        finally:
            timing.store_s += time.perf_counter() - t0

    @staticmethod
    def _decode(raw: bytes | None) -> SessionState | None:
        if raw is None:
            return None
        try:
            return decode(raw)
        except StoreError as exc:
            # Another format (an older or newer cairn) or damage: the visit starts afresh.
            log.warning("unreadable session state replaced by a new visit: %s", exc)
            return None

    @staticmethod
    def _stored_gru_state(model: LoadedModel, state: SessionState | None) -> GruState | None:
        """The stored GRU state if the serving model produced it; None when it must be replayed."""
        if state is None:
            return model.gru.start()
        if state.model_tag != model.tag:
            return None
        hidden = model.gru.hidden_from_bytes(state.hidden)
        if hidden is None:
            return None
        return GruState(hidden, model.gru.hidden_from_bytes(state.previous_hidden), -1)

    @staticmethod
    async def _replay(model: LoadedModel, items: tuple[str, ...]) -> GruState:
        gru_state = model.gru.start()
        for index in model.known_indices(items):
            gru_state = await model.gru.advance(gru_state, index)
        return gru_state

    @staticmethod
    def _last_known(model: LoadedModel, items: tuple[str, ...]) -> int:
        for item_id in reversed(items):
            index = model.index_of(item_id)
            if index >= 0:
                return index
        return -1

    @staticmethod
    def _fallback(model: LoadedModel, index: int, count: int, seen: frozenset[int]) -> tuple[Ranking, str]:
        """Neighbours of a known item, else popularity."""
        if index >= 0:
            return model.neighbours.neighbours_of(index, count, seen), "neighbours"
        return model.popularity.top(count, seen), "popularity"

    @staticmethod
    def _answer(model: LoadedModel, ranking: Ranking, served_by: str, reason: str | None, sequence: int) -> Answer:
        return Answer(
            item_ids=model.ids_of(ranking.items),
            scores=ranking.scores,
            served_by=served_by,
            model_version=model.tag,
            fallback_reason=reason,
            sequence=sequence,
        )
