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

The budget, phase by phase (with the guards on, see service/resilience):
- waiting for the visit's lock, loading and saving are each bounded by what is left of the budget
  (a store call gets at least MIN_STORE_WAIT_S, so a click already computed is not thrown away
  for a sub-millisecond overrun); the store's circuit breaker refuses calls while it is open;
- the model starts only if its breaker lets it and the running p95 of one step, times the steps
  this click needs (a replay needs one per stored click), plus the p95 of a store call for the
  save, fits in what is left; else `budget`. A model call that runs past the deadline is
  abandoned (`deadline`) and counts against the breaker, as does one that fails (`model_error`).
Fallback reasons: unknown_item, no_history, budget, deadline, model_unavailable, model_error,
store_unavailable. An answer with sequence 0 and store_unavailable or deadline did not record the click.
Nothing here logs item ids or hidden states.
"""

from __future__ import annotations

import asyncio
import logging
import time
from collections.abc import AsyncIterator, Awaitable, Callable
from contextlib import asynccontextmanager
from dataclasses import dataclass, field
from typing import Any

from service.errors import StoreError
from service.resilience.guards import Guards
from service.runtime.active import ActiveModel, LoadedModel, ModelChoice
from service.runtime.recommenders import GruState, Ranking
from service.store.base import SessionStore
from service.store.recent import RecentWrites
from service.store.state import SessionState, decode, encode, token_of

log = logging.getLogger("cairn.service")

MAX_ATTEMPTS = 32  # check-and-set rounds before a click gives up (each lost round means another click landed)
MIN_STORE_WAIT_S = 0.002  # least time a store call gets; a loopback Redis round trip is 0.1-0.3 ms (measured)
# uvloop's timers tick in whole milliseconds (libuv keeps loop time in ms), so a timeout can fire up
# to a millisecond late: the model's is set that much early.
TIMER_MARGIN_S = 0.001
_NO_SEEN: frozenset[int] = frozenset()


@dataclass
class Timing:
    """Time spent per part of one request, for Server-Timing and the metrics."""

    started: float = field(default_factory=time.perf_counter)
    store_s: float = 0.0
    model_s: float = 0.0  # the model as the request saw it: queue, thread hand-over, replay, scoring
    step_s: float = 0.0  # of that, ONNX Runtime's call that scored this click


@dataclass
class Answer:
    item_ids: list[str]
    scores: list[float]
    served_by: str  # gru | neighbours | popularity
    model_version: str  # "name/version" of the artifact that answered
    fallback_reason: str | None
    sequence: int  # clicks the visit has applied; 0 with store_unavailable or deadline: this click was not recorded
    duplicate: bool = False


class _LockWaitExpired(Exception):
    """The request's budget ran out while it waited for its visit's lock."""


class _NoTimeout:
    """Stands in for asyncio.timeout when the guards are off: nothing scheduled, nothing cancelled."""

    async def __aenter__(self) -> None:
        return None

    async def __aexit__(self, *exc: object) -> None:
        return None


_NO_TIMEOUT = _NoTimeout()


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
    ) -> None:
        self.store = store
        self.active = active
        self.history_length = history_length
        self.event_memory = event_memory
        self.guards = guards
        self.recent = recent  # this process's last writes: a click may skip the store's read
        self._guard_model = guards is not None and guards.enabled
        # The in-process store cannot stall or fail on its own: it runs unguarded.
        self._guard_store = self._guard_model and store.kind != "memory"
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
            async with self._locks.hold(session_id, deadline if self._guard_model else None):
                recent = self.recent
                for attempt in range(MAX_ATTEMPTS):
                    # Only the first round may trust the recent write: a lost check-and-set means it is stale.
                    raw = recent.get(session_id) if recent is not None and attempt == 0 else None
                    if raw is None:
                        raw = await self._load(session_id, deadline, timing)
                    state = self._decode(raw)
                    model, choice = self.active.current
                    if event_id is not None and state is not None and event_id in state.event_ids:
                        answer = await self._current(model, choice, state, count, exclude_seen, deadline, timing)
                        answer.duplicate = True
                        return answer
                    new_state, answer = await self._apply(model, choice, state, item_id, event_id, count, exclude_seen, deadline, timing)
                    value = encode(new_state)
                    if recent is None:
                        if await self._save(session_id, value, token_of(raw), deadline, timing):
                            return answer
                    elif await self._save_remembered(recent, session_id, value, token_of(raw), deadline, timing):
                        return answer
                raise StoreError(f"{MAX_ATTEMPTS} concurrent writes to one session in a row; click not recorded")
        except StoreError as exc:
            # With the guards on, the store breaker logs outages as they start and end; one line per
            # request would flood the log while one lasts.
            (log.debug if self._guard_store else log.warning)("session store unavailable, answering without the visit: %s", exc)
            return self._without_visit(item_id, count, exclude_seen, "store_unavailable")
        except _LockWaitExpired:
            return self._without_visit(item_id, count, exclude_seen, "deadline")

    async def current(self, session_id: str, count: int, exclude_seen: bool, budget_s: float, timing: Timing) -> Answer:
        deadline = timing.started + budget_s
        model, choice = self.active.current
        try:
            state = self._decode(await self._load(session_id, deadline, timing))
        except StoreError as exc:
            (log.debug if self._guard_store else log.warning)("session store unavailable, answering without the visit: %s", exc)
            return self._answer(model, model.popularity.top(count), "popularity", "store_unavailable", 0)
        return await self._current(model, choice, state, count, exclude_seen, deadline, timing)

    async def forget(self, session_id: str, budget_s: float, timing: Timing) -> None:
        """Delete the visit; StoreError when the store cannot (the caller answers 503)."""
        if self.recent is not None:
            self.recent.forget(session_id)
        await self._store_call(self.store.delete, (session_id,), session_id, timing.started + budget_s, timing)

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
            steps = 1 if gru_state is not None else 1 + len(model.known_indices(history))
            ticket, reason, model_deadline = self._admit(steps, True, deadline)
            if reason is None:

                async def advance() -> tuple[GruState, Ranking]:
                    start = gru_state if gru_state is not None else await self._replay(model, history)
                    return await model.gru.step(start, index, count, seen)

                ran, reason = await self._run_model(advance, ticket, model_deadline, steps, timing)
                if ran is not None:
                    new_gru, ranking = ran
                    served_by = "gru"
                    hidden, previous, tag = new_gru.hidden.tobytes(), new_gru.previous.tobytes(), model.tag
            if reason is not None:
                ranking, served_by = self._fallback(model, index, count, seen)
                hidden = previous = tag = None  # the next request rebuilds the state by replay
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
        replay = stored is None or stored.previous is None
        steps = 1 + (len(model.known_indices(state.items)) if replay else 0)
        ticket, reason, model_deadline = self._admit(steps, False, deadline)
        if reason is None:

            async def rerank() -> tuple[None, Ranking]:
                gru_state = await self._replay(model, state.items) if replay else GruState(stored.hidden, stored.previous, last)
                return None, await model.gru.rank(gru_state, count, seen)

            ran, reason = await self._run_model(rerank, ticket, model_deadline, steps, timing)
            if ran is not None:
                return self._answer(model, ran[1], "gru", None, state.sequence)
        ranking, served_by = self._fallback(model, last, count, seen)
        return self._answer(model, ranking, served_by, reason, state.sequence)

    # -- guards ---------------------------------------------------------------------------------

    def _admit(self, steps: int, saves: bool, deadline: float) -> tuple[int | None, str | None, float]:
        """(breaker ticket, None, the model's own deadline) when the model may run `steps` steps now,
        else (None, fallback reason, 0). The model's deadline leaves room for the save after it."""
        if not self._guard_model:
            return None, None, deadline
        guards = self.guards
        ticket = guards.model.allow()
        if ticket is None:
            return None, "model_unavailable", 0.0
        now = time.perf_counter()
        model_deadline = deadline - TIMER_MARGIN_S
        if saves and self._guard_store:
            model_deadline -= guards.store_latency.estimate(now)
        if now + guards.model_latency.estimate(now) * steps > model_deadline:
            guards.model.release(ticket)
            return None, "budget", 0.0
        return ticket, None, model_deadline

    async def _run_model(
        self,
        call: Callable[[], Awaitable[tuple[Any, Ranking]]],
        ticket: int | None,
        model_deadline: float,
        steps: int,
        timing: Timing,
    ) -> tuple[tuple[Any, Ranking] | None, str | None]:
        """`call` (the admitted model work of a request) under its deadline and breaker: (its result,
        None), or (None, the fallback reason) when it failed or ran past the deadline."""
        t0 = time.perf_counter()
        try:
            async with self._model_timeout(model_deadline, t0):
                result = await call()
            timing.step_s = result[1].step_s
            self._model_done(ticket, t0, steps)
            return result, None
        except asyncio.CancelledError:
            self._model_abandoned(ticket)
            raise
        except Exception as exc:  # noqa: BLE001 - whatever the model does wrong, the visitor gets the fallback
            return None, self._model_failed(ticket, exc)
        finally:
            timing.model_s += time.perf_counter() - t0

    def _model_timeout(self, deadline: float, now: float) -> Any:
        if not self._guard_model:
            return _NO_TIMEOUT
        return asyncio.timeout(deadline - now if deadline > now else 0.0)

    def _model_done(self, ticket: int | None, started: float, steps: int) -> None:
        if self._guard_model:
            now = time.perf_counter()
            self.guards.model.record(ticket, True)
            self.guards.model_latency.observe((now - started) / steps, now)

    def _model_failed(self, ticket: int | None, exc: Exception) -> str:
        if self._guard_model:
            self.guards.model.record(ticket, False)
        if isinstance(exc, TimeoutError):
            return "deadline"
        log.error("GRU step failed, answering from the neighbour table: %s", type(exc).__name__)
        return "model_error"

    def _model_abandoned(self, ticket: int | None) -> None:
        if self._guard_model:
            self.guards.model.release(ticket)

    async def _load(self, session_id: str, deadline: float, timing: Timing) -> bytes | None:
        return await self._store_call(self.store.load, (session_id,), session_id, deadline, timing)

    async def _save(self, session_id: str, value: bytes, expected: bytes, deadline: float, timing: Timing) -> bool:
        return await self._store_call(self.store.save, (session_id, value, expected), session_id, deadline, timing)

    async def _save_remembered(
        self, recent: RecentWrites, session_id: str, value: bytes, expected: bytes, deadline: float, timing: Timing
    ) -> bool:
        """`_save`, keeping the value as this process's recent write when it landed; forgetting it on
        any other outcome (lost race, store error, cancelled: what the store holds is not known)."""
        written_at = recent.clock()
        landed = False
        try:
            landed = await self._save(session_id, value, expected, deadline, timing)
        finally:
            if landed:
                recent.put(session_id, value, written_at)
            else:
                recent.forget(session_id)
        return landed

    async def _store_call(
        self, method: Callable[..., Awaitable[Any]], args: tuple, session_id: str, deadline: float, timing: Timing
    ) -> Any:
        """One store call: through the breaker of the part that holds the session, bounded by the budget."""
        t0 = time.perf_counter()
        try:
            if not self._guard_store:
                return await method(*args)
            breaker = self.guards.store_breaker(self.store.shard_of(session_id))
            ticket = breaker.allow()
            if ticket is None:
                raise StoreError(f"circuit breaker {breaker.name} is open")
            left = deadline - t0
            try:
                async with asyncio.timeout(left if left > MIN_STORE_WAIT_S else MIN_STORE_WAIT_S):
                    result = await method(*args)
            except TimeoutError as exc:
                breaker.record(ticket, False)
                raise StoreError("no answer within the request's budget") from exc
            except StoreError:
                breaker.record(ticket, False)
                raise
            except BaseException:
                breaker.release(ticket)
                raise
            now = time.perf_counter()
            breaker.record(ticket, True)
            self.guards.store_latency.observe(now - t0, now)
            return result
        finally:
            timing.store_s += time.perf_counter() - t0

    # -- helpers --------------------------------------------------------------------------------

    def _without_visit(self, item_id: str, count: int, exclude_seen: bool, reason: str) -> Answer:
        """The clicked item's neighbours (popularity for an unknown item), the click not recorded."""
        model, _ = self.active.current
        index = model.index_of(item_id)
        seen = frozenset(model.known_indices((item_id,))) if exclude_seen else _NO_SEEN
        ranking, served_by = self._fallback(model, index, count, seen)
        return self._answer(model, ranking, served_by, reason, 0)

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
            model_version=model.tag,
            fallback_reason=reason,
            sequence=sequence,
        )
