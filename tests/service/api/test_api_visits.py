"""A visit over real HTTP, against the memory store and a real Redis (the `server` fixture runs both).

The reference for every GRU answer is the exported step graph run directly with OnnxStep on the
same clicks in the same order (conftest `Offline`), never the service's own code.
"""

from __future__ import annotations

import asyncio
import re

import httpx
import pytest

from service.store.state import decode

CLICKS = ["sku-000010", "sku-000123", "sku-000042", "sku-000377"]


def click(client: httpx.Client, session: str, item: object, **extra: object) -> dict:
    r = client.post(f"/v1/sessions/{session}/clicks", json={"item_id": item, **extra})
    assert r.status_code == 200, r.text
    return r.json()


def ids(answer: dict) -> list[str]:
    return [i["item_id"] for i in answer["items"]]


def test_recommendations_follow_the_visit_and_equal_the_offline_model(server, offline, sid):
    session = sid()
    with server.client() as c:
        previous = None
        for n in range(1, len(CLICKS) + 1):
            answer = click(c, session, CLICKS[n - 1], count=10)
            assert answer["served_by"] == "gru" and answer["fallback_reason"] is None
            assert answer["artifact"] == "shop/v1" and answer["sequence"] == n
            expected_ids, expected_scores = offline["v1"].top(CLICKS[:n], count=10)
            assert ids(answer) == expected_ids
            assert [i["score"] for i in answer["items"]] == pytest.approx(expected_scores, rel=1e-5, abs=1e-6)
            assert ids(answer) != previous  # the list moves with the visit
            previous = ids(answer)


def test_current_list_equals_the_last_clicks_answer(server, offline, sid):
    session = sid()
    with server.client() as c:
        for item in CLICKS[:3]:
            last = click(c, session, item, count=7)
        current = c.get(f"/v1/sessions/{session}/recommendations", params={"count": 7}).json()
    assert ids(current) == ids(last) == offline["v1"].top(CLICKS[:3], count=7)[0]
    assert current["served_by"] == "gru" and current["sequence"] == 3 and current["duplicate"] is False


def test_exclude_seen(server, offline, sid):
    session = sid()
    with server.client() as c:
        # Click the model's own favourites: with exclude_seen they must not come back.
        first = click(c, session, CLICKS[0], count=5)
        second = click(c, session, ids(first)[0], count=5)
        third = click(c, session, ids(second)[0], count=20)
        seen = {CLICKS[0], ids(first)[0], ids(second)[0]}
        assert not seen & set(ids(third)) and len(ids(third)) == 20
        clicks = [CLICKS[0], ids(first)[0], ids(second)[0]]
        assert ids(third) == offline["v1"].top(clicks, count=20)[0]
        kept = c.get(f"/v1/sessions/{session}/recommendations", params={"count": 20, "exclude_seen": "false"}).json()
    assert ids(kept) == offline["v1"].top(clicks, count=20, exclude_seen=False)[0]


def test_never_seen_session_gets_popularity(server, offline, sid):
    with server.client() as c:
        answer = c.get(f"/v1/sessions/{sid()}/recommendations", params={"count": 5}).json()
    a = offline["v1"].artifact
    by_popularity = sorted(range(a.n_items), key=lambda i: -a.popularity[i])[:5]  # reference: plain sort
    assert ids(answer) == [a.item_ids[i] for i in by_popularity]
    assert answer["served_by"] == "popularity" and answer["fallback_reason"] == "no_history" and answer["sequence"] == 0


def test_unknown_item_is_recorded_and_answered_from_the_last_known_neighbours(server, offline, sid):
    session = sid()
    a = offline["v1"].artifact
    with server.client() as c:
        first = click(c, session, "no-such-item", count=5)
        assert first["served_by"] == "popularity" and first["fallback_reason"] == "unknown_item"
        click(c, session, CLICKS[0])
        answer = click(c, session, 987654321, count=5)  # an integer id: taken as "987654321", unknown too
        assert answer["served_by"] == "neighbours" and answer["fallback_reason"] == "unknown_item"
        row = [a.item_ids[i] for i in a.neighbour_items[a.item_index[CLICKS[0]]] if i >= 0 and a.item_ids[i] != CLICKS[0]]
        assert ids(answer) == row[:5]
        # The GRU skipped the unknown clicks: the next known click equals the offline model on the known ones.
        after = click(c, session, CLICKS[1], count=5)
        assert after["sequence"] == 4 and after["served_by"] == "gru"
        assert ids(after) == offline["v1"].top(CLICKS[:2], count=5)[0]


def test_integer_item_id_is_stored_as_its_decimal_string(fresh_server, sid, redis_url):
    # Read back from Redis with a plain client: the stored value, decoded, holds the ids as text.
    import redis as redis_sync

    running = fresh_server("redis")
    session = sid()
    with running.client() as c:
        click(c, session, 42)
        click(c, session, "42")
        click(c, session, CLICKS[0])
    raw = redis_sync.Redis.from_url(redis_url).get(f"{running.settings.redis_prefix}s:{session}")
    state = decode(raw, session)
    assert state.items == ("42", "42", CLICKS[0]) and state.sequence == 3
    assert state.model_tag == "shop/v1" and len(state.hidden) == 4 * 32  # float32 [1, 32]


def test_a_value_of_another_session_is_neither_served_nor_overwritten(fresh_server, sid, redis_url):
    # As if the store answered one visit's GET with another's value: the key holds a copy of
    # visit A's state. The click on B must not build its answer from A's clicks, nor replace it.
    import redis as redis_sync

    running = fresh_server("redis")
    plain = redis_sync.Redis.from_url(redis_url)
    a, b = sid(), sid()
    prefix = running.settings.redis_prefix
    with running.client() as c:
        click(c, a, CLICKS[0])
        foreign = plain.get(f"{prefix}s:{a}")
        plain.set(f"{prefix}s:{b}", foreign)
        answer = click(c, b, CLICKS[1])
        assert answer["fallback_reason"] == "store_unavailable" and answer["served_by"] == "neighbours"
        assert answer["sequence"] == 0 and answer["recorded"] == "no"
        current = c.get(f"/v1/sessions/{b}/recommendations")
        assert current.status_code == 200 and current.json()["fallback_reason"] == "store_unavailable"
    assert plain.get(f"{prefix}s:{b}") == foreign and decode(plain.get(f"{prefix}s:{a}"), a).items == (CLICKS[0],)


def test_duplicate_event_is_acknowledged_once(server, sid):
    session = sid()
    with server.client() as c:
        first = click(c, session, CLICKS[0], event_id="e-1")
        again = click(c, session, CLICKS[1], event_id="e-1")  # a retried request: must not be applied
        assert again["duplicate"] is True and again["sequence"] == 1
        assert ids(again) == ids(first)
        other = click(c, session, CLICKS[1], event_id="e-2")
        assert other["duplicate"] is False and other["sequence"] == 2


def test_delete_then_get_is_a_fresh_visit(server, sid):
    session = sid()
    with server.client() as c:
        click(c, session, CLICKS[0])
        click(c, session, CLICKS[1])
        assert c.delete(f"/v1/sessions/{session}").status_code == 204
        assert c.delete(f"/v1/sessions/{session}").status_code == 204  # idempotent
        answer = c.get(f"/v1/sessions/{session}/recommendations").json()
        assert answer["sequence"] == 0 and answer["served_by"] == "popularity"
        assert click(c, session, CLICKS[2])["sequence"] == 1


def test_concurrent_clicks_on_one_session_all_land(server, sid):
    session = sid()
    items = [f"sku-{i:06d}" for i in range(100, 150)]

    async def burst() -> list[dict]:
        async with httpx.AsyncClient(base_url=server.url, timeout=30, limits=httpx.Limits(max_connections=50)) as c:
            # A generous budget: this test is about every click landing, not about the deadline.
            replies = await asyncio.gather(*(c.post(f"/v1/sessions/{session}/clicks", json={"item_id": i, "budget_ms": 10_000}) for i in items))
        assert all(r.status_code == 200 for r in replies), [r.text for r in replies if r.status_code != 200]
        return [r.json() for r in replies]

    answers = asyncio.run(burst())
    assert sorted(a["sequence"] for a in answers) == list(range(1, 51))  # each applied once, none lost
    assert all(a["fallback_reason"] is None for a in answers)
    with server.client() as c:
        assert c.get(f"/v1/sessions/{session}/recommendations").json()["sequence"] == 50


# W3C Server Timing (https://www.w3.org/TR/server-timing/#the-server-timing-header-field):
# metric *( OWS ";" OWS param ) separated by ","; a metric name is an RFC 9110 token, dur is milliseconds.
_TOKEN = r"[!#$%&'*+\-.^_`|~0-9A-Za-z]+"
_ENTRY = re.compile(rf"^({_TOKEN})(?:\s*;\s*dur=(\d+(?:\.\d+)?))?$")


def parse_server_timing(value: str) -> dict[str, float]:
    out = {}
    for entry in value.split(","):
        m = _ENTRY.match(entry.strip())
        assert m, f"not a Server-Timing entry: {entry!r}"
        out[m.group(1)] = float(m.group(2))
    return out


def test_every_response_carries_server_timing(server, sid):
    session = sid()
    with server.client() as c:
        replies = [
            c.post(f"/v1/sessions/{session}/clicks", json={"item_id": CLICKS[0]}),
            c.get(f"/v1/sessions/{session}/recommendations"),
            c.delete(f"/v1/sessions/{session}"),
            c.get("/healthz"),
            c.get("/metrics"),
            c.get("/no/such/route"),
            c.post(f"/v1/sessions/{session}/clicks", json={}),
        ]
    for r in replies:
        timing = parse_server_timing(r.headers["server-timing"])
        assert set(timing) == {"store", "model", "step", "total"}, r.headers["server-timing"]
        assert 0 <= timing["store"] <= timing["total"] and 0 <= timing["step"] <= timing["model"] <= timing["total"]
    click_timing = parse_server_timing(replies[0].headers["server-timing"])
    assert replies[0].json()["served_by"] == "gru"
    assert click_timing["model"] > 0 and click_timing["store"] > 0 and click_timing["step"] > 0


def test_openapi_page_is_served(server):
    with server.client() as c:
        assert c.get("/docs").status_code == 200
        paths = c.get("/openapi.json").json()["paths"]
    assert {"/v1/sessions/{session_id}/clicks", "/v1/sessions/{session_id}/recommendations", "/v1/serving"} <= set(paths)
