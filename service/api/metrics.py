"""Metrics in the Prometheus text exposition format 0.0.4, written here without a client library.

Format reference: https://prometheus.io/docs/instrumenting/exposition_formats/ (text format 0.0.4):
one `# HELP` and one `# TYPE` line per family, then one sample per line, `name{label="value"} number`;
label values escape backslash, double quote and line feed; a histogram is cumulative `_bucket`
samples with an `le` label ending in `+Inf`, then `_sum` and `_count`.

Values are recorded once per request at the HTTP edge, never inside the scoring loops. Each worker
process keeps its own registry: with several workers a scrape sees the worker that answered it.
"""

from __future__ import annotations

import bisect
import math
import os
from abc import ABC, abstractmethod
from collections.abc import Callable, Iterable

from service.resilience.breaker import BreakerState

CONTENT_TYPE = "text/plain; version=0.0.4; charset=utf-8"

# Seconds, from half a millisecond (a memory-store click) to the longest budget (10 s).
LATENCY_BUCKETS = (0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0)


def _escape_label(value: str) -> str:
    return value.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n")


def _escape_help(value: str) -> str:
    return value.replace("\\", "\\\\").replace("\n", "\\n")


def _number(value: float) -> str:
    if math.isinf(value):
        return "+Inf" if value > 0 else "-Inf"
    if math.isnan(value):
        return "NaN"
    value = float(value)
    return str(int(value)) if value.is_integer() and abs(value) < 1e15 else repr(value)


def _labels(names: tuple[str, ...], values: tuple[str, ...], extra: str = "") -> str:
    parts = [f'{n}="{_escape_label(v)}"' for n, v in zip(names, values)]
    if extra:
        parts.append(extra)
    return "{" + ",".join(parts) + "}" if parts else ""


class _Family(ABC):
    """One metric family: its header, and the samples each kind writes."""

    kind = ""

    def __init__(self, name: str, help_text: str, labelnames: tuple[str, ...] = ()) -> None:
        self.name = name
        self.help = help_text
        self.labelnames = labelnames

    def header(self) -> list[str]:
        return [f"# HELP {self.name} {_escape_help(self.help)}", f"# TYPE {self.name} {self.kind}"]

    @abstractmethod
    def lines(self) -> Iterable[str]: ...


class Counter(_Family):
    kind = "counter"

    def __init__(self, name: str, help_text: str, labelnames: tuple[str, ...] = ()) -> None:
        if not name.endswith("_total"):
            raise ValueError(f"counter {name!r}: counters end in _total (Prometheus naming practice)")
        super().__init__(name, help_text, labelnames)
        self._values: dict[tuple[str, ...], float] = {}

    def inc(self, labels: tuple[str, ...] = (), amount: float = 1.0) -> None:
        self._values[labels] = self._values.get(labels, 0.0) + amount

    def value(self, labels: tuple[str, ...] = ()) -> float:
        return self._values.get(labels, 0.0)

    def lines(self) -> Iterable[str]:
        for labels, value in sorted(self._values.items()):
            yield f"{self.name}{_labels(self.labelnames, labels)} {_number(value)}"


class Gauge(_Family):
    kind = "gauge"

    def __init__(self, name: str, help_text: str, labelnames: tuple[str, ...] = ()) -> None:
        super().__init__(name, help_text, labelnames)
        self._values: dict[tuple[str, ...], float] = {}

    def set(self, labels: tuple[str, ...], value: float) -> None:
        self._values[labels] = value

    def clear(self) -> None:
        self._values.clear()

    def lines(self) -> Iterable[str]:
        for labels, value in sorted(self._values.items()):
            yield f"{self.name}{_labels(self.labelnames, labels)} {_number(value)}"


class Histogram(_Family):
    kind = "histogram"

    def __init__(
        self, name: str, help_text: str, labelnames: tuple[str, ...] = (), buckets: tuple[float, ...] = LATENCY_BUCKETS
    ) -> None:
        super().__init__(name, help_text, labelnames)
        if list(buckets) != sorted(set(buckets)):
            raise ValueError(f"histogram {name!r}: buckets must increase strictly")
        self.buckets = tuple(buckets)
        self._series: dict[tuple[str, ...], list[float]] = {}  # labels -> per-bucket counts (+Inf last), sum

    def observe(self, labels: tuple[str, ...], value: float) -> None:
        series = self._series.get(labels)
        if series is None:
            series = self._series[labels] = [0.0] * (len(self.buckets) + 2)
        series[bisect.bisect_left(self.buckets, value)] += 1  # first bucket with value <= le
        series[-1] += value

    def count(self, labels: tuple[str, ...] = ()) -> int:
        series = self._series.get(labels)
        return 0 if series is None else int(sum(series[:-1]))

    def lines(self) -> Iterable[str]:
        for labels, series in sorted(self._series.items()):
            cumulative = 0.0
            for bound, n in zip((*self.buckets, math.inf), series[:-1]):
                cumulative += n
                le = f'le="{_number(bound)}"'
                yield f"{self.name}_bucket{_labels(self.labelnames, labels, le)} {_number(cumulative)}"
            yield f"{self.name}_sum{_labels(self.labelnames, labels)} {_number(series[-1])}"
            yield f"{self.name}_count{_labels(self.labelnames, labels)} {_number(cumulative)}"


class Registry:
    def __init__(self) -> None:
        self._families: list[_Family] = []
        self._collectors: list[Callable[[], None]] = []

    def add(self, family: _Family) -> _Family:
        if any(f.name == family.name for f in self._families):
            raise ValueError(f"metric family {family.name!r} registered twice")
        self._families.append(family)
        return family

    def on_collect(self, collector: Callable[[], None]) -> None:
        """Run `collector` before each rendering (to copy values kept elsewhere into gauges)."""
        self._collectors.append(collector)

    def render(self) -> str:
        for collect in self._collectors:
            collect()
        out: list[str] = []
        for family in self._families:
            out.extend(family.header())
            out.extend(family.lines())
        return "\n".join(out) + "\n"


class ServiceMetrics:
    """The service's families, named and documented in one place."""

    def __init__(self) -> None:
        self.registry = Registry()
        add = self.registry.add
        self.request_duration: Histogram = add(
            Histogram("cairn_http_request_duration_seconds", "Time from request to response start, by route.", ("route", "method"))
        )
        self.requests: Counter = add(Counter("cairn_http_requests_total", "Requests answered, by route and status.", ("route", "method", "status")))
        self.answer_duration: Histogram = add(
            Histogram("cairn_recommendation_duration_seconds", "Time to answer with recommendations, by the recommender that answered.", ("served_by",))
        )
        self.fallbacks: Counter = add(Counter("cairn_fallbacks_total", "Answers not given by the active recommender, by reason.", ("reason",)))
        self.store_duration: Histogram = add(
            Histogram("cairn_store_duration_seconds", "Time one request spent in the session store.", ("store",))
        )
        self.model_duration: Histogram = add(
            Histogram("cairn_model_duration_seconds", "Time one request spent in the model (queue wait and scoring).", ("served_by",))
        )
        self.active_model: Gauge = add(
            Gauge("cairn_serving_info", "1 for the artifact and recommender this worker serves.", ("name", "version", "recommender"))
        )
        self.worker: Gauge = add(
            Gauge("cairn_worker_info", "1, labelled with the process id of the worker that answered this scrape.", ("pid",))
        )
        self.worker.set((str(os.getpid()),), 1.0)
        self.gru_batches: Gauge = add(Gauge("cairn_gru_batches", "GRU scoring calls made by the active model since it was loaded."))
        self.gru_batched_clicks: Gauge = add(
            Gauge("cairn_gru_batched_clicks", "Clicks scored by those calls; divided by cairn_gru_batches, the mean batch size.")
        )
        self.gru_scoring: Counter = add(
            Counter("cairn_gru_scoring_total", "GRU answers by scoring path: exact (every item, float32), fp16 or int8 (approximate candidates re-scored exactly).", ("scoring",))
        )
        self.state_cache: Gauge = add(
            Gauge("cairn_state_cache_lookups", "Clicks whose session state was found in this worker's recent writes (hit) or read from the store (miss).", ("result",))
        )
        self.breaker_state: Gauge = add(
            Gauge("cairn_breaker_state", "Circuit breaker state: 0 closed, 1 half-open, 2 open.", ("breaker",))
        )
        self.breaker_transitions: Counter = add(
            Counter("cairn_breaker_transitions_total", "Circuit breaker state changes, by breaker and the states left and entered.", ("breaker", "from", "to"))
        )
        self.latency_estimate: Gauge = add(
            Gauge("cairn_latency_estimate_seconds", "The running high quantile of one call that the budget check uses, by part (model step, store call).", ("part",))
        )

    def breaker_changed(self, name: str, old: BreakerState, new: BreakerState) -> None:
        self.breaker_transitions.inc((name, old.label, new.label))
        self.breaker_state.set((name,), float(new))

    def render(self) -> str:
        return self.registry.render()
