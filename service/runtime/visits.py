"""A click end to end, independent of HTTP: load the visit, advance the recommender, store, answer.

    load state -> map the item id (unknown: record it, answer from the neighbours of the visit's
    last known item or from popularity) -> advance the active recommender within the request's
    budget (breaker open, budget too small, too late or failed: the neighbour table) -> rank,
    without seen items when asked -> check-and-set the new state (lost the race: re-read and redo)
    -> answer

Clicks on one visit are serialised inside a process by a per-session lock, so they rarely race;
across workers and replicas the store's check-and-set makes sure none is lost. The GRU's hidden
state is trusted only when the model that produced it is the one serving now; otherwise the stored
clicks are replayed through the serving model first (a model switch loses no visit's context).
A click the GRU did not see (fallback) is stored without a hidden state, so the next one replays.

The budget, phase by phase (with the guards on): waiting for the visit's lock is bounded by what is
left of the budget; loading and saving go through the guarded store
(service/resilience/guarded_store.py: breaker and deadline per store call); the model runs only
when the model gate admits it and under its deadline (service/resilience/model_gate.py).
This module holds the click logic alone.
Fallback reasons: unknown_item, no_history, budget, deadline, model_unavailable, model_error,
store_unavailable. Whether the click is in the store, the answer says in `recorded`, truthfully:
"yes" (stored now, or before under the same event_id), "no" (nothing was written: the store or the
visit's lock was not reached in time, or the breaker was open), "unknown" (the write was sent and no
answer came within the budget: it may have landed; a retry with the same event_id is never applied
twice).
Nothing here logs item ids or hidden states.
"""

from __future__ import annotations

import asyncio
import logging
import time
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from dataclasses import dataclass

from service.config import RecommenderKind
from service.errors import ForeignStateError, StoreError, StoreWriteUnknownError
from service.resilience.guarded_store import GuardedStore
from service.resilience.guards import Guards
from service.resilience.loop_lag import LoopLag
from service.resilience.model_gate import Admission, ModelGate
from service.runtime.active import ActiveModel, LoadedModel
from service.runtime.arms import Arms
from service.runtime.recommenders import GruState, Ranking
from service.runtime.timing import Timing
from service.store.base import SessionStore
from service.store.recent import RecentWrites
from service.store.state import SessionState, decode, encode, token_of

log = logging.getLogger("cairn.service")

MAX_ATTEMPTS = 32  # check-and-set rounds before a click gives up (each lost round means another click landed)
_NO_SEEN: frozenset[int] = frozenset()


@dataclass
class Answer:
    item_ids: list[str]
    scores: list[float]
    served_by: str  # gru | session-knn | neighbours | popularity
    artifact: str  # "name/version" of the artifact that answered
    fallback_reason: str | None
    sequence: int  # clicks the visit has applied; 0 when the click is not known to be recorded
    duplicate: bool = False
    recorded: str = "yes"  # yes | no | unknown: is this click in the session store (see the module docstring)
    arm: str | None = None  # the visit's experiment arm; None without an experiment


class _LockWaitExpired(Exception):
    """The request's budget ran out while it waited for its visit's lock."""


class _KeyedLocks:
    """One asyncio lock per session id, dropped when nobody holds or waits for it."""

    def __init__(self) -> None:
        self._locks: dict[str, tuple[asyncio.Lock, list[int]]] = {}

    @asynccontextmanager
    async def hold(self, key: str, deadline: float | None = None) -> AsyncIterator[None]:
        """Hold the key's lock; with a deadline (perf_counter), wait for it no longer (_LockWaitExpired)."""
        entry = self._locks.get(key)
        if entry is None:
            entry = self._locks[key] = (asyncio.Lock(), [0])
        entry[1][0] += 1
        try:
            lock = entry[0]
            if deadline is None or not lock.locked():
                await lock.acquire()  # free: taken at once, no timer needed
            else:
                wait = deadline - time.perf_counter()
                try:
                    async with asyncio.timeout(wait if wait > 0 else 0):
                        await lock.acquire()
                except TimeoutError:
                    raise _LockWaitExpired from None
            try:
                yield
            finally:
                lock.release()
        finally:
            entry[1][0] -= 1
            if entry[1][0] == 0:
                del self._locks[key]


class Visits:
    def __init__(
        self,
        store: SessionStore,
        active: ActiveModel,
        history_length: int,
        event_memory: int,
        guards: Guards | None = None,
        recent: RecentWrites | None = None,
        arms: Arms | None = None,
        loop_lag: LoopLag | None = None,
        probe_after_s: float = 1.0,
    ) -> None:
        self.store = GuardedStore(store, guards)
        self.gate = ModelGate(guards, loop_lag, probe_after_s, arm=arms.experiment.arms[0].name if arms is not None else None)
        # In an experiment each arm's model has a gate of its own: one arm's failing model never
        # shuts out the other's (service/resilience/guards.py).
        self._arm_gates = {name: ModelGate(guards, loop_lag, probe_after_s, arm=name) for name in arms.models} if arms is not None else {}
        self.active = active
        self.history_length = history_length
        self.event_memory = event_memory
        self.recent = recent  # this process's last writes: a click may skip the store's read
        self._locks = _KeyedLocks()
        self.arms = arms  # an experiment: each visit is served by its arm's model (service/runtime/arms.py)

    def active_for(self, session_id: str) -> tuple[ActiveModel, str | None]:
        """The model serving this visit and its experiment arm (None without an experiment)."""
        if self.arms is None:
            return self.active, None
        return self.arms.for_session(session_id)

    async def click(
        self,
        session_id: str,
        item_id: str,
        event_id: str | None,
        count: int,
        exclude_seen: bool | None,
        budget_s: float,
        timing: Timing,
    ) -> Answer:
        """exclude_seen None: the serving artifact's default (its evaluation's choice)."""
        deadline = timing.started + budget_s
        active, arm = self.active_for(session_id)
        answer = await self._click(active, self._gate(arm), session_id, item_id, event_id, count, exclude_seen, deadline, timing)
        answer.arm = arm
        return answer

    def _gate(self, arm: str | None) -> ModelGate:
        return self._arm_gates[arm] if arm is not None else self.gate

    async def _click(
        self,
        active: ActiveModel,
        gate: ModelGate,
        session_id: str,
        item_id: str,
        event_id: str | None,
        count: int,
        exclude_seen: bool,
        deadline: float,
        timing: Timing,
    ) -> Answer:
        try:
            async with self._locks.hold(session_id, deadline if gate.guarded else None):
                recent = self.recent
                for attempt in range(MAX_ATTEMPTS):
                    # Only the first round may trust the recent write: a lost check-and-set means it is stale.
                    hit = recent.lookup(session_id) if recent is not None and attempt == 0 else None
                    if hit is None or hit[1] is None:
                        raw = hit[0] if hit is not None else await self.store.load(session_id, deadline, timing)
                        state = self._decode(raw, session_id)
                    else:
                        raw, state = hit
                    model, choice = active.current
                    kind = RecommenderKind(choice.recommender)
                    if event_id is not None and state is not None and event_id in state.event_ids:
                        answer = await self._current(gate, model, kind, state, count, exclude_seen, deadline, timing)
                        answer.duplicate = True
                        return answer
                    new_state, answer = await self._apply(gate, model, kind, state, item_id, event_id, count, exclude_seen, deadline, timing)
                    value = encode(new_state, session_id)
                    if recent is None:
                        if await self.store.save(session_id, value, token_of(raw), deadline, timing):
                            return answer
                    elif await self._save_remembered(recent, session_id, value, new_state, token_of(raw), deadline, timing):
                        return answer
                raise StoreError(f"{MAX_ATTEMPTS} concurrent writes to one session in a row; click not recorded")
        except StoreError as exc:
            # With the guards on, the store breaker logs outages as they start and end; one line per
            # request would flood the log while one lasts.
            (log.debug if self.store.guarded else log.warning)("session store unavailable, answering without the visit: %s", exc)
            recorded = "unknown" if isinstance(exc, StoreWriteUnknownError) else "no"
            return self._without_visit(active, item_id, count, exclude_seen, "store_unavailable", recorded)
        except _LockWaitExpired:
            return self._without_visit(active, item_id, count, exclude_seen, "deadline", "no")

    async def current(self, session_id: str, count: int, exclude_seen: bool | None, budget_s: float, timing: Timing) -> Answer:
        deadline = timing.started + budget_s
        active, arm = self.active_for(session_id)
        model, choice = active.current
        try:
            state = self._decode(await self.store.load(session_id, deadline, timing), session_id)
        except StoreError as exc:
            (log.debug if self.store.guarded else log.warning)("session store unavailable, answering without the visit: %s", exc)
            answer = self._answer(model, model.popularity.top(count), "popularity", "store_unavailable", 0)
        else:
            answer = await self._current(self._gate(arm), model, RecommenderKind(choice.recommender), state, count, exclude_seen, deadline, timing)
        answer.recorded = "no"  # a request without a click records nothing
        answer.arm = arm
        return answer

    async def forget(self, session_id: str, budget_s: float, timing: Timing) -> None:
        """Delete the visit; StoreError when the store cannot (the caller answers 503)."""
        if self.recent is not None:
            self.recent.forget(session_id)
        await self.store.delete(session_id, timing.started + budget_s, timing)

    # -- the click path -------------------------------------------------------------------------

    async def _apply(
        self,
        gate: ModelGate,
        model: LoadedModel,
        kind: RecommenderKind,
        state: SessionState | None,
        item_id: str,
        event_id: str | None,
        count: int,
        exclude_seen: bool | None,
        deadline: float,
        timing: Timing,
    ) -> tuple[SessionState, Answer]:
        history = state.items if state is not None else ()
        index = model.index_of(item_id)
        if exclude_seen is None:
            exclude_seen = model.exclude_seen
        seen = frozenset(model.known_indices((*history, item_id))) if exclude_seen else _NO_SEEN
        # What the new state keeps of the GRU: unchanged unless the GRU ran on this click.
        hidden = state.hidden if state is not None else None
        previous = state.previous_hidden if state is not None else None
        tag = state.model_tag if state is not None else None
        reason: str | None = None

        if index < 0:
            # The model never saw this id: the GRU skips it (as a replay would), the click is still kept.
            ranking, served_by = self._fallback(model, self._last_known(model, history), count, seen)
            reason = None if kind is RecommenderKind.POPULARITY else "unknown_item"
        elif kind is RecommenderKind.GRU:
            gru_state = self._stored_gru_state(model, state)
            steps = 1 if gru_state is not None else 1 + len(model.known_indices(history))
            admission = self._admit(gate, steps, True, deadline)
            reason = admission if isinstance(admission, str) else None
            if reason is None:

                async def advance() -> tuple[GruState, Ranking]:
                    start = gru_state if gru_state is not None else await self._replay(model, history)
                    return await model.gru.step(start, index, count, seen)

                ran, reason = await gate.run(advance, admission, timing)
                if ran is not None:
                    new_gru, ranking = ran
                    served_by = "gru"
                    hidden, previous, tag = new_gru.hidden.tobytes(), new_gru.previous.tobytes(), model.tag
            if reason is not None:
                ranking, served_by = self._fallback(model, index, count, seen)
                hidden = previous = tag = None  # the next request rebuilds the state by replay
        elif kind is RecommenderKind.SESSION_KNN:
            ranking, served_by, reason = await self._session_knn(gate, model, (*history, item_id), index, count, seen, True, deadline, timing)
            hidden = previous = tag = None  # the GRU did not see this click
        else:
            ranking, served_by = self._fallback(model, index if kind is RecommenderKind.NEIGHBOURS else -1, count, seen)
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
        gate: ModelGate,
        model: LoadedModel,
        kind: RecommenderKind,
        state: SessionState | None,
        count: int,
        exclude_seen: bool | None,
        deadline: float,
        timing: Timing,
    ) -> Answer:
        if exclude_seen is None:
            exclude_seen = model.exclude_seen
        if state is None or not state.items:
            reason = None if kind is RecommenderKind.POPULARITY else "no_history"
            return self._answer(model, model.popularity.top(count), "popularity", reason, 0 if state is None else state.sequence)
        seen = frozenset(model.known_indices(state.items)) if exclude_seen else _NO_SEEN
        last = model.index_of(state.items[-1])
        if last < 0:
            ranking, served_by = self._fallback(model, self._last_known(model, state.items), count, seen)
            reason = None if kind is RecommenderKind.POPULARITY else "unknown_item"
            return self._answer(model, ranking, served_by, reason, state.sequence)
        if kind is RecommenderKind.SESSION_KNN:
            ranking, served_by, reason = await self._session_knn(gate, model, state.items, last, count, seen, False, deadline, timing)
            return self._answer(model, ranking, served_by, reason, state.sequence)
        if kind is not RecommenderKind.GRU:
            ranking, served_by = self._fallback(model, last if kind is RecommenderKind.NEIGHBOURS else -1, count, seen)
            return self._answer(model, ranking, served_by, None, state.sequence)
        stored = self._stored_gru_state(model, state)
        replay = stored is None or stored.previous is None
        steps = 1 + (len(model.known_indices(state.items)) if replay else 0)
        admission = self._admit(gate, steps, False, deadline)
        reason = admission if isinstance(admission, str) else None
        if reason is None:

            async def rerank() -> tuple[None, Ranking]:
                gru_state = await self._replay(model, state.items) if replay else GruState(stored.hidden, stored.previous, last)
                return None, await model.gru.rank(gru_state, count, seen)

            ran, reason = await gate.run(rerank, admission, timing)
            if ran is not None:
                return self._answer(model, ran[1], "gru", None, state.sequence)
        ranking, served_by = self._fallback(model, last, count, seen)
        return self._answer(model, ranking, served_by, reason, state.sequence)

    async def _session_knn(
        self, gate: ModelGate, model: LoadedModel, items: tuple[str, ...], last: int, count: int, seen: frozenset[int], saves: bool, deadline: float, timing: Timing
    ) -> tuple[Ranking, str, str | None]:
        """Session-KNN over the visit's recent clicks (the stored history), through the model's gate:
        (ranking, served_by, fallback reason); the neighbour table when it cannot answer."""
        knn = model.session_knn
        if knn is None:  # the switch refuses such a pair; a model swapped under a request falls back
            ranking, served_by = self._fallback(model, last, count, seen)
            return ranking, served_by, "model_unavailable"
        admission = self._admit(gate, 1, saves, deadline)
        reason = admission if isinstance(admission, str) else None
        if reason is None:
            visit = model.known_indices(items)

            async def recommend() -> tuple[None, Ranking]:
                return None, knn.recommend(visit, count, seen)

            ran, reason = await gate.run(recommend, admission, timing, what="session-KNN")
            if ran is not None:
                return ran[1], "session-knn", None
        ranking, served_by = self._fallback(model, last, count, seen)
        return ranking, served_by, reason

    # -- guards ---------------------------------------------------------------------------------

    def _admit(self, gate: ModelGate, steps: int, saves: bool, deadline: float) -> Admission | str:
        """The model gate's admission for `steps` steps, keeping the store's reserve when the click saves."""
        reserve = self.store.save_reserve_s(time.perf_counter()) if saves else 0.0
        return gate.admit(steps, deadline, reserve)

    async def _save_remembered(
        self, recent: RecentWrites, session_id: str, value: bytes, state: SessionState, expected: bytes, deadline: float, timing: Timing
    ) -> bool:
        """A save, keeping the value as this process's recent write when it landed; forgetting it on
        any other outcome (lost race, store error, cancelled: what the store holds is not known)."""
        written_at = recent.clock()
        landed = False
        try:
            landed = await self.store.save(session_id, value, expected, deadline, timing)
        finally:
            if landed:
                recent.put(session_id, value, written_at, state)
            else:
                recent.forget(session_id)
        return landed

    # -- helpers --------------------------------------------------------------------------------

    def _without_visit(self, active: ActiveModel, item_id: str, count: int, exclude_seen: bool | None, reason: str, recorded: str) -> Answer:
        """The clicked item's neighbours (popularity for an unknown item); the click not known to be stored."""
        model, _ = active.current
        if exclude_seen is None:
            exclude_seen = model.exclude_seen
        index = model.index_of(item_id)
        seen = frozenset(model.known_indices((item_id,))) if exclude_seen else _NO_SEEN
        ranking, served_by = self._fallback(model, index, count, seen)
        answer = self._answer(model, ranking, served_by, reason, 0)
        answer.recorded = recorded
        return answer

    @staticmethod
    def _decode(raw: bytes | None, session_id: str) -> SessionState | None:
        if raw is None:
            return None
        try:
            return decode(raw, session_id)
        except ForeignStateError:
            raise  # a store failure, not this visit's value: never overwritten, never served
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
        hidden = model.hidden_from_bytes(state.hidden)
        if hidden is None:
            return None
        return GruState(hidden, model.hidden_from_bytes(state.previous_hidden), -1)

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
            artifact=model.tag,
            fallback_reason=reason,
            sequence=sequence,
        )
