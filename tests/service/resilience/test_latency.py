"""The running quantile the budget check uses, against NumPy's nearest-rank quantile.

Reference: Hyndman and Fan, "Sample Quantiles in Statistical Packages" (The American Statistician,
1996), definition 1 (the inverse of the empirical distribution function), which NumPy implements as
numpy.quantile(..., method="inverted_cdf").
"""

from __future__ import annotations

import numpy as np
import pytest

from service.resilience.latency import LatencyWindow


@pytest.mark.parametrize("quantile", [0.5, 0.9, 0.95, 0.99])
@pytest.mark.parametrize("n", [1, 2, 7, 20, 100, 256])
def test_quantile_equals_numpy_inverted_cdf(quantile, n):
    rng = np.random.default_rng(n)
    values = rng.lognormal(-7, 1, size=n)  # seconds, skewed like latencies
    window = LatencyWindow(size=256, quantile=quantile, max_age_s=60)
    for v in values:
        window.observe(float(v), now=10.0)
    assert window.compute(10.0) == pytest.approx(np.quantile(values, quantile, method="inverted_cdf"), rel=0, abs=0)


def test_only_the_last_size_samples_count():
    window = LatencyWindow(size=50, quantile=0.95, max_age_s=60)
    for v in range(1000):
        window.observe(float(v), now=1.0)
    assert window.compute(1.0) == np.quantile(np.arange(950, 1000), 0.95, method="inverted_cdf")


def test_old_samples_age_out_and_an_empty_window_estimates_zero():
    window = LatencyWindow(size=64, quantile=0.95, max_age_s=5.0)
    for _ in range(10):
        window.observe(0.3, now=100.0)  # a slow spell
    assert window.estimate(100.0) == 0.3
    for _ in range(10):
        window.observe(0.001, now=103.0)
    assert window.compute(104.0) == 0.3  # 95% of 20 samples: the slow ones still count
    assert window.compute(105.5) == 0.001  # the slow spell is older than 5 s
    assert window.compute(109.0) == 0.0  # nothing recent: nothing known, nothing refused


def test_the_estimate_is_cached_between_refreshes_but_follows_a_slowdown_at_once():
    window = LatencyWindow(size=64, quantile=0.5, max_age_s=60, refresh_every=4, refresh_s=10.0)
    for _ in range(5):
        window.observe(5.0, now=0.0)
    assert window.estimate(0.0) == 5.0
    for _ in range(3):
        window.observe(1.0, now=0.0)
    assert window.estimate(0.0) == 5.0  # three faster samples: not recomputed yet (median of 8 is still 5)
    for _ in range(3):
        window.observe(1.0, now=0.0)
    assert window.estimate(0.0) == 1.0  # after the fourth: recomputed, 6 of 11 samples are 1
    window.observe(9.0, now=0.0)
    window.observe(9.0, now=0.0)
    assert window.estimate(0.0) == 5.0  # slower than the estimate: recomputed at once (median of 1x6, 5x5, 9x2)
    window.observe(0.5, now=0.0)
    assert window.estimate(0.0) == 5.0  # faster: cached
    assert window.estimate(11.0) == 1.0  # ten seconds on: recomputed (the median of 14 samples is now 1)
    window.clear()
    assert window.estimate(11.0) == 0.0


def test_a_refused_model_is_probed_only_on_an_idle_loop_and_one_at_a_time() -> None:
    import time

    from service.config import Settings
    from service.resilience.guards import Guards
    from service.resilience.loop_lag import LoopLag
    from service.resilience.model_gate import Admission, ModelGate

    guards = Guards(Settings())
    lag = LoopLag()
    gate = ModelGate(guards, lag, probe_after_s=1.0)
    now = time.perf_counter()
    guards.model_latency.observe(0.040, now - 2.0)  # a 40 ms step measured 2 s ago, nothing since
    deadline = now + 0.020  # 20 ms left: the estimate says no
    lag.record(0.010)  # a busy loop (10 ms backlog): overload, not a stall
    assert gate.admit(1, deadline, 0.0) == "budget"
    for _ in range(10):
        lag.record(0.0001)  # the loop idles again
    probe = gate.admit(1, deadline, 0.0)
    assert isinstance(probe, Admission) and probe.probe
    assert gate.admit(1, deadline, 0.0) == "budget"  # one probe at a time
    guards.model_latency.observe(0.001, time.perf_counter())  # a fresh sample: no probe needed for a while
    gate._probing = False
    assert gate.admit(1, deadline, 0.0) == "budget"


def test_a_failed_call_is_logged_under_its_own_name(caplog) -> None:
    # A session-KNN failure must not read as a GRU failure in the log (the operator looks at the
    # wrong model otherwise).
    import asyncio
    import logging
    import time

    from service.config import Settings
    from service.resilience.guards import Guards
    from service.resilience.model_gate import ModelGate
    from service.runtime.timing import Timing

    gate = ModelGate(Guards(Settings()))

    async def broken():
        raise RuntimeError("index damaged")

    async def go(what: str | None):
        admission = gate.admit(1, time.perf_counter() + 1.0, 0.0)
        kwargs = {} if what is None else {"what": what}
        return await gate.run(broken, admission, Timing(), **kwargs)

    with caplog.at_level(logging.ERROR, logger="cairn.service"):
        assert asyncio.run(go("session-KNN")) == (None, "model_error")
        assert asyncio.run(go(None)) == (None, "model_error")
    messages = [r.getMessage() for r in caplog.records]
    assert messages == [
        "session-KNN failed, answering from the neighbour table: RuntimeError",
        "GRU step failed, answering from the neighbour table: RuntimeError",
    ]
