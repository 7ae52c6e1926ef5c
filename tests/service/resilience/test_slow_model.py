"""A model that turns slow: answers keep to the budget, come from the fallback, and the model's
circuit breaker opens; when the slowness ends it half-opens and closes, and visits are rebuilt.

The slowness is a small class passed to the app factory (conftest `ModelFault`), not a patch.
"""

from __future__ import annotations

import time

BUDGET_MS = 50
# What "within budget" allows on top, measured at the client over loopback HTTP: the budget is
# checked between phases, so an answer may run over by one phase's end plus writing the reply, and a
# loaded 2-core CI machine runs the event loop late by tens of milliseconds now and then (common
# practice for a deadline enforced in-process). The bound stays far below the 300 ms step the test
# injects, so waiting for the slow model still fails; the resilience benchmark measures the p99.
SLACK_MS = 50
COOL_DOWN_S = 0.5
BREAKER = dict(model_breaker_min_calls=5, model_breaker_failure_ratio=0.5, model_breaker_cool_down_s=COOL_DOWN_S, model_breaker_trial_calls=2)


def test_slow_model_answers_within_budget_and_its_breaker_opens_then_closes(start_server, offline, sid, kit):
    fault = kit.ModelFault()
    # The memory store: a click whose model ran to the deadline is saved in the few milliseconds the
    # store still gets (MIN_STORE_WAIT_S), which a Redis round trip on a loaded 2-core machine can
    # miss (store_unavailable); this test is about the model's path. Redis outages: test_store_outage.
    server = start_server("memory", wrap_model=fault.wrap, default_budget_ms=BUDGET_MS, **BREAKER)
    sessions = [sid("slow") for _ in range(4)]
    clicks = {s: [f"sku-{(17 * k + 3 * n) % 400:06d}" for n in range(6)] for k, s in enumerate(sessions)}
    with server.client() as c:
        for s in sessions:  # healthy: the GRU answers
            answer = c.post(f"/v1/sessions/{s}/clicks", json={"item_id": clicks[s][0]}).json()
            assert answer["served_by"] == "gru" and answer["fallback_reason"] is None

        fault.delay_s = 0.3  # every step now takes 300 ms, six times the budget
        slow = []
        for n in range(1, 5):
            for s in sessions:
                t0 = time.perf_counter()
                r = c.post(f"/v1/sessions/{s}/clicks", json={"item_id": clicks[s][n]})
                slow.append(((time.perf_counter() - t0) * 1e3, r.status_code, r.json(), s, n))
        reasons = [a["fallback_reason"] for _, _, a, _, _ in slow]
        assert all(status == 200 for _, status, _, _, _ in slow)
        # Started and abandoned at the deadline until half of the window's calls had failed (four
        # successes, then the fourth failure: 4 of 8), then refused while the breaker was open.
        assert reasons[:4] == ["deadline"] * 4 and set(reasons[4:]) == {"model_unavailable"}, reasons
        for ms, _, answer, s, n in slow:
            assert ms <= BUDGET_MS + SLACK_MS, (ms, answer["fallback_reason"])
            assert answer["elapsed_ms"] <= BUDGET_MS + SLACK_MS, answer
            assert answer["served_by"] == "neighbours" and answer["sequence"] == n + 1  # recorded all the same
            assert kit.ids(answer) == offline["v1"].neighbours(clicks[s][n], seen=tuple(clicks[s][:n]))
        metrics = c.get("/metrics").text
        assert kit.metric(metrics, "cairn_breaker_state", breaker="model") == 2  # open
        assert kit.metric(metrics, "cairn_breaker_transitions_total", breaker="model", **{"from": "closed", "to": "open"}) == 1
        assert kit.metric(metrics, "cairn_fallbacks_total", reason="model_unavailable") == 12
        ready = c.get("/readyz")
        assert ready.status_code == 503 and ready.json()["degraded"] == ["model"] and ready.json()["breakers"]["model"] == "open"
        assert c.get("/healthz").status_code == 200

        fault.delay_s = 0.0  # the slowness ends
        time.sleep(COOL_DOWN_S + 0.1)
        back = [c.post(f"/v1/sessions/{s}/clicks", json={"item_id": clicks[s][5]}).json() for s in sessions]
        # Two trial calls pass and close the breaker; every visit is rebuilt by replaying its stored clicks.
        assert [a["served_by"] for a in back] == ["gru"] * 4, back
        for s, answer in zip(sessions, back):
            assert answer["sequence"] == 6 and kit.ids(answer) == offline["v1"].top(clicks[s], count=10)
        metrics = c.get("/metrics").text
        assert kit.metric(metrics, "cairn_breaker_state", breaker="model") == 0
        assert kit.metric(metrics, "cairn_breaker_transitions_total", breaker="model", **{"from": "open", "to": "half-open"}) == 1
        assert kit.metric(metrics, "cairn_breaker_transitions_total", breaker="model", **{"from": "half-open", "to": "closed"}) == 1
        assert c.get("/readyz").status_code == 200


def test_a_budget_the_model_would_not_fit_in_is_answered_without_starting_it(start_server, sid, offline, kit):
    fault = kit.ModelFault()
    fault.delay_s = 0.03  # a slow but working model: every step takes 30 ms
    server = start_server("memory", wrap_model=fault.wrap)
    sessions = [sid("fit") for _ in range(6)]
    with server.client() as c:
        for s in sessions:  # 100 ms budgets: the steps fit and run, and their latency is measured
            answer = c.post(f"/v1/sessions/{s}/clicks", json={"item_id": "sku-000101", "budget_ms": 100}).json()
            assert answer["served_by"] == "gru"
        estimate = kit.metric(c.get("/metrics").text, "cairn_latency_estimate_seconds", part="model")
        assert 0.03 <= estimate < 0.06
        for s in sessions:  # 20 ms budgets: a 30 ms step cannot fit, so it is not started
            answer = c.post(f"/v1/sessions/{s}/clicks", json={"item_id": "sku-000202", "budget_ms": 20}).json()
            assert answer["fallback_reason"] == "budget" and answer["served_by"] == "neighbours"
            assert answer["elapsed_ms"] < 15, answer  # answered at once, not at the 20 ms end of the budget nor after the 30 ms step
            assert answer["sequence"] == 2 and kit.ids(answer) == offline["v1"].neighbours("sku-000202", seen=("sku-000101",))
        # A budget the model fits in still gets the model, with the visit replayed.
        answer = c.post(f"/v1/sessions/{sessions[0]}/clicks", json={"item_id": "sku-000303", "budget_ms": 200}).json()
        assert answer["served_by"] == "gru" and kit.ids(answer) == offline["v1"].top(["sku-000101", "sku-000202", "sku-000303"])
        metrics = c.get("/metrics").text
    assert kit.metric(metrics, "cairn_breaker_state", breaker="model") == 0  # not calling the model is no failure of it
    assert kit.metric(metrics, "cairn_fallbacks_total", reason="budget") == 6


def test_after_a_short_stall_the_model_answers_again_within_two_seconds(start_server, sid, kit):
    # A stall lifts the step estimate past what a 25 ms request can hold; nothing refused is ever
    # measured, so without a probe the neighbour table would answer until the slow samples aged out
    # (CAIRN_LATENCY_MAX_AGE_S, 30 s here). The idle service probes once a second and comes back.
    fault = kit.ModelFault()
    server = start_server("memory", wrap_model=fault.wrap, default_budget_ms=100, latency_probe_s=1.0)
    with server.client() as c:
        fault.delay_s = 0.04  # the stall: each step 40 ms, still inside the 100 ms budget, so it is measured
        for n in range(8):
            answer = c.post(f"/v1/sessions/{sid('stall')}/clicks", json={"item_id": f"sku-{n:06d}"}).json()
            assert answer["served_by"] == "gru"
        fault.delay_s = 0.0  # the stall ends
        ended = time.monotonic()
        first = c.post(f"/v1/sessions/{sid('stall')}/clicks", json={"item_id": "sku-000100", "budget_ms": 25}).json()
        assert first["served_by"] == "neighbours" and first["fallback_reason"] == "budget"  # the estimate still says 40 ms
        back = None
        while time.monotonic() - ended < 2.0:
            answer = c.post(f"/v1/sessions/{sid('stall')}/clicks", json={"item_id": "sku-000101", "budget_ms": 25}).json()
            if answer["served_by"] == "gru":
                back = time.monotonic() - ended
                break
            time.sleep(0.1)
        assert back is not None, "the model did not answer again within 2 s of the stall's end"
        for n in range(5):  # and it stays: the window restarted from the probe's fast sample
            answer = c.post(f"/v1/sessions/{sid('stall')}/clicks", json={"item_id": f"sku-{n + 200:06d}", "budget_ms": 25}).json()
            assert answer["served_by"] == "gru", answer
