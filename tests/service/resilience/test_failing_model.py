"""A model whose every step raises: no 5xx, the breaker opens after its threshold, and every click
made during the outage is in the visit afterwards, which the model then rebuilds by replay.

The failure is a small class passed to the app factory (conftest `ModelFault`), not a patch.
"""

from __future__ import annotations

import time

import redis as redis_sync

from service.store.state import decode

COOL_DOWN_S = 0.4
BREAKER = dict(model_breaker_min_calls=6, model_breaker_failure_ratio=0.5, model_breaker_cool_down_s=COOL_DOWN_S, model_breaker_trial_calls=1)


def test_failing_model_falls_back_keeps_every_click_and_replays_them(start_server, shared_redis, offline, sid, kit):
    fault = kit.ModelFault()
    server = start_server(shared_redis.url, wrap_model=fault.wrap, **BREAKER)
    a, b = sid("fail"), sid("fail")
    clicks = {a: [f"sku-{n:06d}" for n in (11, 22, 33, 44, 55, 66, 77, 88)], b: [f"sku-{n:06d}" for n in (101, 202, 303, 4, 5, 6, 7, 8)]}
    with server.client() as c:
        for s in (a, b):
            answer = c.post(f"/v1/sessions/{s}/clicks", json={"item_id": clicks[s][0]}).json()
            assert answer["served_by"] == "gru"

        fault.failing = True
        during = []
        for n in range(1, 7):
            for s in (a, b):
                r = c.post(f"/v1/sessions/{s}/clicks", json={"item_id": clicks[s][n], "event_id": f"{s}-{n}"})
                assert r.status_code == 200, r.text
                during.append(r.json())
        reasons = [x["fallback_reason"] for x in during]
        # Two successes, then failures until the window held six calls and half had failed: the
        # fourth failure (4 of 6) opens the breaker, and the model is not called after it.
        assert reasons[:4] == ["model_error"] * 4 and set(reasons[4:]) == {"model_unavailable"}, reasons
        assert all(x["served_by"] == "neighbours" for x in during)
        assert [x["sequence"] for x in during] == [n for n in range(2, 8) for _ in (a, b)]  # every click recorded, once
        ready = c.get("/readyz")
        assert ready.status_code == 503 and ready.json()["degraded"] == ["model"]
        # The current list still answers (from the neighbour table) while the model is out.
        current = c.get(f"/v1/sessions/{a}/recommendations").json()
        assert current["fallback_reason"] == "model_unavailable" and current["sequence"] == 7

    plain = redis_sync.Redis.from_url(shared_redis.url)
    stored = {s: decode(plain.get(f"{server.settings.redis_prefix}s:{s}"), s) for s in (a, b)}
    for s in (a, b):
        assert stored[s].items == tuple(clicks[s][:7]) and stored[s].sequence == 7
        assert stored[s].hidden is None and stored[s].model_tag is None  # no stale hidden state kept: replay marked
        assert stored[s].event_ids == tuple(f"{s}-{n}" for n in range(1, 7))

    fault.failing = False
    time.sleep(COOL_DOWN_S + 0.1)
    with server.client() as c:
        back = c.post(f"/v1/sessions/{a}/clicks", json={"item_id": clicks[a][7]}).json()  # the one trial call
        assert back["served_by"] == "gru" and back["sequence"] == 8
        assert kit.ids(back) == offline["v1"].top(clicks[a], count=10)  # all eight clicks, replayed through the model
        after = c.post(f"/v1/sessions/{b}/clicks", json={"item_id": clicks[b][7]}).json()
        assert after["served_by"] == "gru" and kit.ids(after) == offline["v1"].top(clicks[b], count=10)
        # A retried click of the outage is recognised by its event id and not applied again.
        again = c.post(f"/v1/sessions/{b}/clicks", json={"item_id": clicks[b][3], "event_id": f"{b}-3"}).json()
        assert again["duplicate"] is True and again["sequence"] == 8
        metrics = c.get("/metrics").text
        assert kit.metric(metrics, "cairn_fallbacks_total", reason="model_error") == 4
        assert kit.metric(metrics, "cairn_breaker_transitions_total", breaker="model", **{"from": "half-open", "to": "closed"}) == 1
        assert c.get("/readyz").status_code == 200
