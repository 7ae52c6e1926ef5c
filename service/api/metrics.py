"""The service's metrics, kept with the Prometheus client library and exposed in its text format.

Values are recorded once per request at the HTTP edge, never inside the scoring loops. With one
worker the library's ordinary registry holds them. With `cairn serve --workers N` each worker keeps
its values in the library's multi-process files (PROMETHEUS_MULTIPROC_DIR, a folder `cairn serve`
makes), and a scrape of any worker reports the whole service: counters and histograms summed over
the workers, gauges per worker (`pid` label) or combined as each family says. Only
`cairn_worker_info` names the worker that answered the scrape.

The small classes below keep the call sites the service has always used (`inc(labels)`,
`observe(labels, value)`, `set(labels, value)`) and a local copy of this worker's values, which the
operator page reads (`snapshot`, `count`).
"""

from __future__ import annotations

import bisect
import os
from collections.abc import Callable

import prometheus_client as prom
from prometheus_client import CollectorRegistry, generate_latest
from prometheus_client.multiprocess import MultiProcessCollector, mark_process_dead

from service.resilience.breaker import BreakerState

# The text exposition a Prometheus server scrapes; the library writes format 0.0.4's lines.
CONTENT_TYPE = "text/plain; version=0.0.4; charset=utf-8"

# Seconds, from half a millisecond (a memory-store click) to the longest budget (10 s).
LATENCY_BUCKETS = (0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0)

prom.disable_created_metrics()  # no *_created series: they double the exposition and nobody here reads them


class Counter:
    def __init__(self, name: str, help_text: str, labelnames: tuple[str, ...] = (), registry: CollectorRegistry | None = None) -> None:
        if not name.endswith("_total"):
            raise ValueError(f"counter {name!r}: counters end in _total (Prometheus naming practice)")
        self.name, self.labelnames = name, labelnames
        self._metric = prom.Counter(name.removesuffix("_total"), help_text, labelnames, registry=registry)
        self._children: dict[tuple[str, ...], object] = {}
        self._values: dict[tuple[str, ...], float] = {}

    def _child(self, labels: tuple[str, ...]):
        child = self._children.get(labels)
        if child is None:
            child = self._children[labels] = self._metric.labels(*labels) if self.labelnames else self._metric
        return child

    def inc(self, labels: tuple[str, ...] = (), amount: float = 1.0) -> None:
        self._child(labels).inc(amount)
        self._values[labels] = self._values.get(labels, 0.0) + amount

    def set_total(self, labels: tuple[str, ...], total: float) -> None:
        """Bring the counter up to a total counted elsewhere (which only grows there)."""
        grown = total - self._values.get(labels, 0.0)
        if grown > 0:
            self.inc(labels, grown)

    def value(self, labels: tuple[str, ...] = ()) -> float:
        return self._values.get(labels, 0.0)

    def snapshot(self) -> dict[tuple[str, ...], float]:
        """A copy of this worker's values (for the operator page's summary; not the click path)."""
        return dict(self._values)


class Gauge:
    def __init__(
        self, name: str, help_text: str, labelnames: tuple[str, ...] = (), registry: CollectorRegistry | None = None, mode: str = "liveall"
    ) -> None:
        self.name, self.labelnames = name, labelnames
        # `mode`: how several workers' values combine in one scrape (the library's multiprocess_mode).
        self._metric = prom.Gauge(name, help_text, labelnames, registry=registry, multiprocess_mode=mode)
        self._values: dict[tuple[str, ...], float] = {}

    def set(self, labels: tuple[str, ...], value: float) -> None:
        (self._metric.labels(*labels) if self.labelnames else self._metric).set(value)
        self._values[labels] = value

    def clear(self) -> None:
        # Zero first: with several workers the library's files keep a series it no longer knows.
        for labels in self._values:
            self._metric.labels(*labels).set(0.0)
        self._metric.clear()
        self._values.clear()


class Histogram:
    def __init__(
        self, name: str, help_text: str, labelnames: tuple[str, ...] = (), buckets: tuple[float, ...] = LATENCY_BUCKETS,
        registry: CollectorRegistry | None = None,
    ) -> None:  # fmt: skip
        if list(buckets) != sorted(set(buckets)):
            raise ValueError(f"histogram {name!r}: buckets must increase strictly")
        self.name, self.labelnames, self.buckets = name, labelnames, tuple(buckets)
        self._metric = prom.Histogram(name, help_text, labelnames, buckets=self.buckets, registry=registry)
        self._children: dict[tuple[str, ...], object] = {}
        self._series: dict[tuple[str, ...], list[float]] = {}  # labels -> per-bucket counts (+Inf last), sum

    def observe(self, labels: tuple[str, ...], value: float) -> None:
        child = self._children.get(labels)
        if child is None:
            child = self._children[labels] = self._metric.labels(*labels) if self.labelnames else self._metric
            self._series[labels] = [0.0] * (len(self.buckets) + 2)
        child.observe(value)
        series = self._series[labels]
        series[bisect.bisect_left(self.buckets, value)] += 1  # first bucket with value <= le
        series[-1] += value

    def count(self, labels: tuple[str, ...] = ()) -> int:
        series = self._series.get(labels)
        return 0 if series is None else int(sum(series[:-1]))

    def snapshot(self) -> dict[tuple[str, ...], list[float]]:
        """A copy of this worker's series: per-bucket counts (not cumulative, +Inf last), then the sum."""
        return {labels: list(series) for labels, series in self._series.items()}


class Registry:
    """The families of one app: in a registry of their own (one app per process in production, many in
    the tests), or in the library's multi-process files when several workers share a port."""

    def __init__(self, multiprocess: bool = False) -> None:
        self.multiprocess = multiprocess
        self.prometheus = CollectorRegistry(auto_describe=True)
        self._collectors: list[Callable[[], None]] = []

    def on_collect(self, collector: Callable[[], None]) -> None:
        """Run `collector` before each rendering (to copy values kept elsewhere into gauges)."""
        self._collectors.append(collector)

    def collect_now(self) -> None:
        for collect in self._collectors:
            collect()

    def render(self, worker_line: str) -> str:
        self.collect_now()
        if self.multiprocess:
            merged = CollectorRegistry()
            MultiProcessCollector(merged)  # every worker's files, summed or labelled by pid per family
            text = generate_latest(merged).decode()
        else:
            text = generate_latest(self.prometheus).decode()
        return text + worker_line

    def worker_exited(self) -> None:
        """Drop this worker's live gauges from the shared files (its counters stay in the sums)."""
        if self.multiprocess:
            mark_process_dead(os.getpid())


class ServiceMetrics:
    """The service's families, named and documented in one place."""

    def __init__(self, multiprocess: bool = False) -> None:
        self.registry = Registry(multiprocess)
        reg = None if multiprocess else self.registry.prometheus  # multi-process values live in the files

        self.request_duration: Histogram = (
            Histogram("cairn_http_request_duration_seconds", "Time from request to response start, by route.", ("route", "method"), registry=reg)
        )
        self.requests: Counter = (Counter("cairn_http_requests_total", "Requests answered, by route and status.", ("route", "method", "status"), registry=reg))
        self.answer_duration: Histogram = (
            Histogram("cairn_recommendation_duration_seconds", "Time to answer with recommendations, by the recommender that answered.", ("served_by",), registry=reg)
        )
        self.fallbacks: Counter = (Counter("cairn_fallbacks_total", "Answers not given by the active recommender, by reason.", ("reason",), registry=reg))
        self.store_duration: Histogram = (
            Histogram("cairn_store_duration_seconds", "Time one request spent in the session store.", ("store",), registry=reg)
        )
        self.model_duration: Histogram = (
            Histogram("cairn_model_duration_seconds", "Time one request spent in the model (queue wait and scoring).", ("served_by",), registry=reg)
        )
        self.active_model: Gauge = (
            Gauge("cairn_serving_info", "1 for the artifact and recommender this worker serves.", ("name", "version", "recommender"), registry=reg)
        )
        # Not a library family: it must name the worker that answered, whichever files the scrape read.
        self._worker_line = (
            "# HELP cairn_worker_info 1, labelled with the process id of the worker that answered this scrape.\n"
            f'# TYPE cairn_worker_info gauge\ncairn_worker_info{{pid="{os.getpid()}"}} 1.0\n'
        )
        self.gru_batches: Gauge = (Gauge("cairn_gru_batches", "GRU scoring calls made by the active model since it was loaded.", registry=reg, mode="livesum"))
        self.gru_batched_clicks: Gauge = (
            Gauge("cairn_gru_batched_clicks", "Clicks scored by those calls; divided by cairn_gru_batches, the mean batch size.", registry=reg, mode="livesum")
        )
        self.gru_held_clicks: Gauge = (
            Gauge("cairn_gru_held_clicks", "Clicks a GRU scoring call was held for, and caught, while the clicks it answered kept coming straight back.", registry=reg, mode="livesum")
        )
        self.gru_scoring: Counter = (
            Counter("cairn_gru_scoring_total", "GRU answers by scoring path: exact (every item, float32), fp16, int8 or int4 (approximate candidates re-scored exactly), clustered (the nearest clusters' items, exact).", ("scoring",), registry=reg)
        )
        self.state_cache: Gauge = (
            Gauge("cairn_state_cache_lookups", "Clicks whose session state was found in this worker's recent writes (hit) or read from the store (miss).", ("result",), registry=reg, mode="livesum")
        )
        self.breaker_state: Gauge = (
            Gauge("cairn_breaker_state", "Circuit breaker state: 0 closed, 1 half-open, 2 open.", ("breaker",), registry=reg, mode="livemax")
        )
        self.breaker_transitions: Counter = (
            Counter("cairn_breaker_transitions_total", "Circuit breaker state changes, by breaker and the states left and entered.", ("breaker", "from", "to"), registry=reg)
        )
        self.latency_estimate: Gauge = (
            Gauge("cairn_latency_estimate_seconds", "The running high quantile of one call that the budget check uses, by part (model step, store call).", ("part",), registry=reg, mode="livemax")
        )

        # Click events and experiment arms (service/events).
        self.events_dropped: Counter = (
            Counter("cairn_events_dropped_total", "Click events dropped because this worker's event buffer was full.", registry=reg)
        )
        self.events_written: Counter = (Counter("cairn_events_written_total", "Click events the event sink acknowledged.", registry=reg))
        self.arm_duration: Histogram = (
            Histogram("cairn_arm_recommendation_duration_seconds", "Time to answer with recommendations, by experiment arm and the recommender that answered.", ("arm", "served_by"), registry=reg)
        )
        self.arm_fallbacks: Counter = (
            Counter("cairn_arm_fallbacks_total", "Answers not given by the arm's recommender, by arm and reason.", ("arm", "reason"), registry=reg)
        )
        self.arm_serving: Gauge = (
            Gauge("cairn_arm_serving_info", "1 for the artifact and recommender each experiment arm serves.", ("arm", "name", "version", "recommender"), registry=reg)
        )

    def breaker_changed(self, name: str, old: BreakerState, new: BreakerState) -> None:
        self.breaker_transitions.inc((name, old.label, new.label))
        self.breaker_state.set((name,), float(new))

    def render(self) -> str:
        return self.registry.render(self._worker_line)
