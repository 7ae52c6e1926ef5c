"""The app factory: routes, the edge middleware, error handlers, and a lifespan that opens (and
closes, in reverse order) the session store and the active model.

Start-up loads and verifies the active artifact: the one the store's shared choice names (so a
restarted worker follows the last switch), else the one the settings name. `/readyz` answers
ready only while the model is loaded, the store answers and no circuit breaker is open.

`wrap_model` is for tests and benchmarks: a class (or any callable) that wraps the GRU recommender
of every loaded artifact, to make it slow or failing without patching the service.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import inspect
import time
from collections.abc import AsyncIterator

from fastapi import FastAPI

from service import __version__
from service.api.deps import Service
from service.api.errors import install_handlers
from service.api.fast_click import ClickFastPath
from service.api.metrics import ServiceMetrics
from service.api.middleware import EdgeMiddleware
from service.api.routes import router
from service.api.logs import configure_logging
from service.config import Settings, load_settings
from service.errors import CairnError, StoreError
from service.resilience.guards import Guards
from service.events.event import Pseudonyms
from service.events.experiment import load_experiment
from service.events.log import EventLog
from service.events.sinks import open_sink
from service.resilience.loop_lag import LoopLag
from service.runtime.active import ActiveModel, ModelChoice, ModelWrapper, resolve_choices
from service.runtime.arms import Arms
from service.runtime.tasks import stop_task
from service.runtime.visits import Visits
from service.store.base import SessionStore, open_store
from service.store.recent import RecentWrites

# FastAPI from 0.165 looks up OpenTelemetry providers (and reads the environment) on every request,
# about 3% of a click's CPU at saturation (py-spy, 32 visits at once). cairn reports through
# Prometheus and installs no OpenTelemetry provider, so where FastAPI has the switch it is off.
_NO_OPENTELEMETRY = (
    {"telemetry": {"tracing": False, "metrics": False, "logs": False}}
    if "telemetry" in inspect.signature(FastAPI.__init__).parameters
    else {}
)

log = logging.getLogger("cairn.service")

DESCRIPTION = """Next-click recommendations for anonymous visits.

Post each click of a visit to `/v1/sessions/{session_id}/clicks`; the answer holds the next
recommendations, which recommender gave them (`served_by`) and why a fallback answered
(`fallback_reason`). Session ids are opaque: 1-128 letters, digits and `-_.:`.
"""


def create_app(settings: Settings, store: SessionStore | None = None, wrap_model: ModelWrapper | None = None) -> FastAPI:
    """The service for `settings`; `store` replaces the one the settings name (tests pass their own)."""
    metrics = ServiceMetrics(multiprocess=settings.workers > 1)

    @contextlib.asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        session_store = store if store is not None else open_store(settings)
        experiment = load_experiment(settings.experiment) if settings.experiment is not None else None
        guards = Guards(settings, on_change=metrics.breaker_changed, arms=[arm.name for arm in experiment.arms] if experiment else ())
        arms = None
        if experiment is not None:
            arms = Arms(experiment, settings, session_store, wrap_model=wrap_model, on_replaced=guards.model_replaced)
            active = arms.models[experiment.arms[0].name]  # the first arm answers /v1/artifacts and /readyz
        else:
            active = ActiveModel(settings, session_store, wrap_model=wrap_model, on_replaced=guards.model_replaced)
        follower: asyncio.Task | None = None
        lag_task: asyncio.Task | None = None
        collector: asyncio.Task | None = None
        loop_lag = LoopLag() if guards.enabled else None
        events: EventLog | None = None
        # The memory store is its own cache; a shared store's reads are worth saving.
        recent = None
        if session_store.kind != "memory" and settings.state_cache_entries > 0:
            recent = RecentWrites(settings.state_cache_entries, settings.session_ttl_s)
        try:
            if arms is not None:
                await arms.open(lambda slot: _shared_choice(session_store, slot))
            else:
                candidates = await asyncio.to_thread(resolve_choices, settings)
                shared = await _shared_choice(session_store)
                if shared is not None and shared not in candidates:
                    candidates.insert(0, shared)
                await _open_first(active, candidates)
            sink = open_sink(settings)
            if sink is not None:
                events = EventLog(sink, settings.events_buffer, settings.events_flush_s)
                events.start()
            key = settings.events_key
            service = Service(
                settings=settings,
                store=session_store,
                active=active,
                visits=Visits(
                    session_store, active, settings.history_length, settings.event_memory, guards, recent, arms,
                    loop_lag=loop_lag, probe_after_s=settings.latency_probe_s,
                ),  # fmt: skip
                metrics=metrics,
                guards=guards,
                events=events,
                pseudonyms=Pseudonyms(None if key is None else key.get_secret_value().encode()),
            )
            metrics.registry.on_collect(lambda: _collect(service))
            if metrics.registry.multiprocess:
                # Other workers answer scrapes too: keep this worker's gauges fresh in the shared files.
                collector = asyncio.get_running_loop().create_task(_collect_every(metrics, COLLECT_S), name="cairn-metrics")
            app.state.service = service
            if loop_lag is not None:
                lag_task = asyncio.get_running_loop().create_task(loop_lag.run(), name="cairn-loop-lag")
            if session_store.kind != "memory":
                follow = arms.follow() if arms is not None else active.follow()
                follower = asyncio.get_running_loop().create_task(follow, name="cairn-model-follower")
            model, choice = active.current
            log.info(
                "ready: %s (%s), %s store, guards %s, default budget %d ms, events %s%s",
                choice.tag, choice.recommender, session_store.kind, "on" if guards.enabled else "off", settings.default_budget_ms,
                settings.events_kind, "" if experiment is None else f", experiment {experiment.name} ({len(experiment.arms)} arms)",
            )  # fmt: skip
            yield
        finally:
            if follower is not None:
                await stop_task(follower)  # a single cancel can be lost inside a Redis call
            if lag_task is not None:
                await stop_task(lag_task)
            if collector is not None:
                await stop_task(collector)
            metrics.registry.worker_exited()
            if events is not None:
                await events.close()  # requests have ended (uvicorn drains them first): write what is buffered
            if arms is not None:
                await arms.close()  # the arms' models, `active` among them
            else:
                await active.close()
            await session_store.close()

    app = FastAPI(title="cairn", version=__version__, description=DESCRIPTION, lifespan=lifespan, **_NO_OPENTELEMETRY)
    # The last added runs first: the edge (body limit, timing, metrics), then the click fast path.
    app.add_middleware(ClickFastPath)
    app.add_middleware(EdgeMiddleware, metrics=metrics, store_kind=settings.store_kind, body_timeout_s=settings.body_timeout_s)
    install_handlers(app)
    app.include_router(router)
    if settings.pages:
        from service.api.pages import install_pages  # imported only when on: the API alone loads none of it

        install_pages(app, metrics)
    return app


async def _open_first(active: ActiveModel, candidates: list[ModelChoice]) -> None:
    """Serve the first candidate that loads: the shared choice, then the configured artifact (or the
    newest versions that verify, newest first). A candidate that fails is logged loudly."""
    for i, choice in enumerate(candidates):
        try:
            await active.open(choice)
            return
        except CairnError as exc:
            if i == len(candidates) - 1:
                raise
            log.error("cannot serve %s (%s); trying %s", choice.tag, exc, candidates[i + 1].tag)


async def _shared_choice(store: SessionStore, slot: str = "") -> ModelChoice | None:
    try:
        raw = await store.load_active_model(slot)
    except StoreError as exc:
        log.warning("session store not reachable at start (%s); serving the configured model", exc)
        return None
    if raw is None:
        return None
    try:
        return ModelChoice.from_bytes(raw)
    except CairnError as exc:
        log.error("ignoring the shared model choice: %s", exc)
        return None


COLLECT_S = 1.0  # with several workers, how often each refreshes its gauges in the shared metric files


async def _collect_every(metrics: ServiceMetrics, interval_s: float) -> None:
    while True:
        await asyncio.sleep(interval_s)
        metrics.registry.collect_now()


def _collect(service: Service) -> None:
    m = service.metrics
    m.active_model.clear()
    if not service.active.ready:
        return
    model, choice = service.active.current
    m.active_model.set((choice.name, choice.version, choice.recommender), 1.0)
    events = service.events
    if events is not None:
        m.events_dropped.set_total((), float(events.dropped))
        m.events_written.set_total((), float(events.written))
    arms = service.visits.arms
    if arms is not None:
        m.arm_serving.clear()
        for arm, arm_active in arms.models.items():
            if arm_active.ready:
                arm_choice = arm_active.current[1]
                m.arm_serving.set((arm, arm_choice.name, arm_choice.version, arm_choice.recommender), 1.0)
    m.gru_batches.set((), float(model.batcher.batches))
    m.gru_batched_clicks.set((), float(model.batcher.clicks))
    m.gru_held_clicks.set((), float(model.batcher.held_clicks))
    recent = service.visits.recent
    if recent is not None:
        m.state_cache.set(("hit",), float(recent.hits))
        m.state_cache.set(("miss",), float(recent.misses))
    guards = service.guards
    for breaker in guards.breakers():
        m.breaker_state.set((breaker.name,), float(breaker.state))  # reading the state moves an open breaker past its cool-down
    now = time.perf_counter()
    for guard in guards.model_guards().values():
        m.latency_estimate.set((guard.breaker.name,), guard.latency.estimate(now))  # "model", or "model@<arm>" per arm
    if service.store.kind != "memory":
        m.latency_estimate.set(("store",), guards.store_latency.estimate(now))


def app_from_environment() -> FastAPI:
    """Factory for uvicorn worker processes: settings from the environment `cairn serve` prepared,
    and the same logging as the parent (a spawned worker inherits none of it)."""
    settings = load_settings()
    configure_logging(settings.log_level)
    return create_app(settings)
