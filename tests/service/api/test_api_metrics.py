"""/metrics against the Prometheus text exposition format 0.0.4, read by a parser written from the spec.

Spec: https://prometheus.io/docs/instrumenting/exposition_formats/#text-based-format
- `# HELP <name> <text>` and `# TYPE <name> <counter|gauge|histogram|summary|untyped>`, at most one
  TYPE per family and before its first sample; other `#` lines are comments;
- a sample is `name{label="value",...} value [timestamp]`; metric names match
  [a-zA-Z_:][a-zA-Z0-9_:]*, label names [a-zA-Z_][a-zA-Z0-9_]*; label values escape \\, \" and \n;
  values are Go floats, NaN, +Inf, -Inf;
- a histogram family `x` has samples x_bucket (label `le`, cumulative, ending at le="+Inf"), x_sum and
  x_count, and the +Inf bucket equals x_count.
"""

from __future__ import annotations

import math
import re
from collections import defaultdict

_NAME = r"[a-zA-Z_:][a-zA-Z0-9_:]*"
_LABEL = r'([a-zA-Z_][a-zA-Z0-9_]*)="((?:[^"\\\n]|\\\\|\\"|\\n)*)"'
_PAIR = r'[a-zA-Z_][a-zA-Z0-9_]*="(?:[^"\\\n]|\\\\|\\"|\\n)*"'  # _LABEL without groups
_SAMPLE = re.compile(rf"^(?P<name>{_NAME})(?:\{{(?P<labels>{_PAIR}(?:,{_PAIR})*,?)?\}})? (?P<value>\S+)(?: (?P<ts>-?\d+))?$")
_VALUE = re.compile(r"^(?:[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?|NaN|[+-]Inf)$")


def _unescape(value: str) -> str:
    return re.sub(r"\\(\\|\"|n)", lambda m: {"\\": "\\", '"': '"', "n": "\n"}[m.group(1)], value)


def parse(text: str) -> tuple[dict[str, str], list[tuple[str, dict[str, str], float]]]:
    types: dict[str, str] = {}
    samples: list[tuple[str, dict[str, str], float]] = []
    assert text.endswith("\n"), "the exposition ends with a line feed"
    for line in text.splitlines():
        if line.startswith("# TYPE "):
            _, _, name, kind = line.split(" ", 3)
            assert re.fullmatch(_NAME, name) and kind in {"counter", "gauge", "histogram", "summary", "untyped"}, line
            assert name not in types, f"second TYPE line for {name}"
            assert not any(s[0] == name or s[0].startswith(name + "_") for s in samples), f"TYPE after samples: {name}"
            types[name] = kind
            continue
        if line.startswith("#") or not line.strip():
            continue
        m = _SAMPLE.match(line)
        assert m, f"not a sample line: {line!r}"
        name, labels_text, value = m.group("name"), m.group("labels") or "", m.group("value")
        assert _VALUE.match(value), f"not a float: {value!r} in {line!r}"
        labels = {k: _unescape(v) for k, v in re.findall(_LABEL, labels_text)}
        samples.append((name, labels, float(value)))
    return types, samples


def _family(sample_name: str, types: dict[str, str]) -> str:
    for suffix in ("_bucket", "_sum", "_count"):
        base = sample_name.removesuffix(suffix)
        if base != sample_name and types.get(base) == "histogram":
            return base
    return sample_name


def check_histograms(types: dict[str, str], samples: list[tuple[str, dict[str, str], float]]) -> None:
    buckets: dict[tuple[str, tuple], list[tuple[float, float]]] = defaultdict(list)
    counts: dict[tuple[str, tuple], float] = {}
    for name, labels, value in samples:
        family = _family(name, types)
        if types.get(family) != "histogram":
            continue
        key = (family, tuple(sorted((k, v) for k, v in labels.items() if k != "le")))
        if name.endswith("_bucket"):
            buckets[key].append((float(labels["le"]), value))
        elif name.endswith("_count"):
            counts[key] = value
    assert buckets, "no histogram samples"
    for key, series in buckets.items():
        bounds = [b for b, _ in series]
        assert bounds == sorted(bounds) and bounds[-1] == math.inf, key
        assert all(a <= b for (_, a), (_, b) in zip(series, series[1:])), f"buckets not cumulative: {key}"
        assert series[-1][1] == counts[key], f"+Inf bucket differs from _count: {key}"


def scrape(client) -> tuple[dict[str, str], list]:
    r = client.get("/metrics")
    assert r.status_code == 200
    assert r.headers["content-type"].startswith("text/plain; version=0.0.4")
    return parse(r.text)


def value_of(samples, metric: str, **labels: str) -> float:
    return sum(v for n, l, v in samples if n == metric and all(l.get(k) == x for k, x in labels.items()))


def test_metrics_parse_and_hold_the_documented_families(server, sid):
    session = sid()
    route = "/v1/sessions/{session_id}/clicks"
    with server.client() as c:
        _, before = scrape(c)
        for item in ["sku-000001", "sku-000002", "not-in-the-model"]:
            assert c.post(f"/v1/sessions/{session}/clicks", json={"item_id": item}).status_code == 200
        assert c.post(f"/v1/sessions/{session}/clicks", json={"count": 3}).status_code == 422
        types, after = scrape(c)
    expected = {
        "cairn_http_request_duration_seconds": "histogram",
        "cairn_http_requests_total": "counter",
        "cairn_recommendation_duration_seconds": "histogram",
        "cairn_fallbacks_total": "counter",
        "cairn_store_duration_seconds": "histogram",
        "cairn_model_duration_seconds": "histogram",
        "cairn_serving_info": "gauge",
        "cairn_breaker_state": "gauge",
        "cairn_breaker_transitions_total": "counter",
        "cairn_latency_estimate_seconds": "gauge",
        "cairn_gru_batches": "gauge",
        "cairn_gru_batched_clicks": "gauge",
        "cairn_gru_held_clicks": "gauge",
    }
    assert expected.items() <= types.items()
    check_histograms(types, after)
    grew = lambda metric, **l: value_of(after, metric, **l) - value_of(before, metric, **l)  # noqa: E731
    assert grew("cairn_http_request_duration_seconds_count", route=route, method="POST") == 4
    assert grew("cairn_http_requests_total", route=route, status="200") == 3
    assert grew("cairn_http_requests_total", route=route, status="422") == 1
    assert grew("cairn_recommendation_duration_seconds_count", served_by="gru") == 2
    assert grew("cairn_fallbacks_total", reason="unknown_item") == 1
    assert grew("cairn_store_duration_seconds_count", store=server.settings.store_kind) == 3
    assert value_of(after, "cairn_serving_info", name="shop", version="v1", recommender="gru") == 1
    # Every breaker has a state sample (0 closed); the model's latency estimate is a step's p95 in seconds.
    assert value_of(after, "cairn_breaker_state", breaker="model") == 0 and value_of(after, "cairn_breaker_state", breaker="store") == 0
    assert 0 < value_of(after, "cairn_latency_estimate_seconds", part="model") < 1
    # Two GRU clicks one after the other: two scoring calls of one click each, neither held.
    assert grew("cairn_gru_batches") == grew("cairn_gru_batched_clicks") == 2 and grew("cairn_gru_held_clicks") == 0
    if server.settings.store_kind == "redis":
        # The visit's first click read Redis; the next two started from this worker's own last write.
        assert types["cairn_state_cache_lookups"] == "gauge"
        assert grew("cairn_state_cache_lookups", result="miss") == 1 and grew("cairn_state_cache_lookups", result="hit") == 2
    else:
        assert not [n for n, _, _ in after if n == "cairn_state_cache_lookups"]  # the memory store is its own cache


def test_parser_refuses_what_the_format_forbids():
    # The parser above is the reference; it must reject malformed expositions, or it proves nothing.
    bad = [
        "x{a=\"1\"} 1",  # no final line feed
        "x{a=1} 1\n",  # unquoted label value
        "x 1 2 3\n",
        "x one\n",
        "# TYPE x counter\n# TYPE x counter\nx 1\n",
        "1x 1\n",
    ]
    for text in bad:
        try:
            parse(text)
        except AssertionError:
            continue
        raise AssertionError(f"accepted: {text!r}")
    types, samples = parse('# HELP x a \\\\ b\n# TYPE x gauge\nx{a="q\\"\\n\\\\"} +Inf\n')
    assert types == {"x": "gauge"} and samples == [("x", {"a": 'q"\n\\'}, math.inf)]
