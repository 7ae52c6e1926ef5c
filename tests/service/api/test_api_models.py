"""Listing artifacts and switching the active one at run time, over real HTTP, against both stores."""

from __future__ import annotations

import pytest

CLICKS = ["sku-000007", "sku-000300", "sku-000055"]


def ids(answer: dict) -> list[str]:
    return [i["item_id"] for i in answer["items"]]


def auth(token: str) -> dict[str, str]:
    return {"authorization": f"Bearer {token}"}


@pytest.fixture(params=["memory", "redis"])
def store(request: pytest.FixtureRequest) -> str:
    return request.param


def test_models_lists_artifacts_with_metrics_and_the_active_one(fresh_server, store):
    running = fresh_server(store)
    with running.client() as c:
        listing = c.get("/v1/artifacts").json()
    assert listing["active"] == {"name": "shop", "version": "v1", "recommender": "gru", "artifact": "shop/v1", "scoring": "exact", "small_batch_rows": None}  # 500 items: auto scores exactly
    by_version = {a["version"]: a for a in listing["artifacts"]}
    assert set(by_version) == {"v0-broken", "v1", "v2"}
    assert by_version["v1"]["active"] and not by_version["v2"]["active"]
    assert by_version["v1"]["verified"] and by_version["v1"]["metrics"] == {} and by_version["v1"]["problem"] is None
    assert not by_version["v0-broken"]["verified"] and "checksum" in by_version["v0-broken"]["problem"]


def test_switch_mid_visit_rebuilds_the_state_by_replay(fresh_server, store, offline, sid, token):
    running = fresh_server(store)
    session = sid()
    with running.client() as c:
        for item in CLICKS[:2]:
            before = c.post(f"/v1/sessions/{session}/clicks", json={"item_id": item, "count": 8}).json()
        assert ids(before) == offline["v1"].top(CLICKS[:2], count=8)[0]
        r = c.put("/v1/serving", json={"name": "shop", "version": "v2"}, headers=auth(token))
        assert r.status_code == 200, r.text
        assert r.json()["artifact"] == "shop/v2"
        # The visit's current list, then its next click, equal a fresh replay of its clicks under v2.
        current = c.get(f"/v1/sessions/{session}/recommendations", params={"count": 8}).json()
        assert current["artifact"] == "shop/v2" and current["served_by"] == "gru"
        assert ids(current) == offline["v2"].top(CLICKS[:2], count=8)[0]
        after = c.post(f"/v1/sessions/{session}/clicks", json={"item_id": CLICKS[2], "count": 8}).json()
        assert after["artifact"] == "shop/v2" and after["sequence"] == 3
        expected_ids, expected_scores = offline["v2"].top(CLICKS, count=8)
        assert ids(after) == expected_ids
        assert [i["score"] for i in after["items"]] == pytest.approx(expected_scores, rel=1e-5, abs=1e-6)
        assert ids(after) != offline["v1"].top(CLICKS, count=8)[0]
        assert c.get("/v1/artifacts").json()["active"]["version"] == "v2"


def test_switch_of_recommender(fresh_server, store, offline, sid, token):
    running = fresh_server(store)
    session = sid()
    a = offline["v1"].artifact
    with running.client() as c:
        c.post(f"/v1/sessions/{session}/clicks", json={"item_id": CLICKS[0]})
        r = c.put("/v1/serving", json={"name": "shop", "version": "v1", "recommender": "neighbours"}, headers=auth(token))
        assert r.status_code == 200 and r.json()["recommender"] == "neighbours"
        answer = c.post(f"/v1/sessions/{session}/clicks", json={"item_id": CLICKS[1], "count": 5}).json()
        assert answer["served_by"] == "neighbours" and answer["fallback_reason"] is None
        row = [a.item_ids[i] for i in a.neighbour_items[a.item_index[CLICKS[1]]] if i >= 0 and a.item_ids[i] not in CLICKS[:2]]
        assert ids(answer) == row[:5]
        # Back to the GRU: the clicks made meanwhile are replayed, nothing of the visit is lost.
        c.put("/v1/serving", json={"name": "shop", "version": "v1", "recommender": "gru"}, headers=auth(token))
        back = c.post(f"/v1/sessions/{session}/clicks", json={"item_id": CLICKS[2], "count": 5}).json()
    assert back["served_by"] == "gru" and ids(back) == offline["v1"].top(CLICKS, count=5)[0]


def test_switch_needs_the_token(fresh_server, store, token):
    running = fresh_server(store)
    body = {"name": "shop", "version": "v2"}
    with running.client() as c:
        for headers in [{}, auth("wrong-token-but-long-enough"), {"authorization": f"Basic {token}"}, auth(token[:-1])]:
            r = c.put("/v1/serving", json=body, headers=headers)
            assert r.status_code == 401 and r.headers["www-authenticate"] == "Bearer", r.text
        # Authentication comes before reading the body: a bad body without a token is still a 401.
        assert c.put("/v1/serving", content=b"{", headers={"content-type": "application/json"}).status_code == 401
        assert c.get("/v1/artifacts").json()["active"]["version"] == "v1"


def test_switch_is_disabled_without_a_token(fresh_server, store, token):
    running = fresh_server(store, admin_token=None)
    with running.client() as c:
        r = c.put("/v1/serving", json={"name": "shop", "version": "v2"}, headers=auth(token))
    assert r.status_code == 403 and "disabled" in r.json()["message"] and "CAIRN_ADMIN_TOKEN" in r.json()["message"]


def test_artifact_that_fails_verification_is_refused_and_the_old_one_keeps_serving(fresh_server, store, offline, sid, token):
    running = fresh_server(store)
    session = sid()
    with running.client() as c:
        r = c.put("/v1/serving", json={"name": "shop", "version": "v0-broken"}, headers=auth(token))
        assert r.status_code == 409, r.text
        assert "checksum" in r.json()["message"] and "still serving shop/v1" in r.json()["message"]
        r = c.put("/v1/serving", json={"name": "shop", "version": "v9"}, headers=auth(token))
        assert r.status_code == 404 and r.json()["error"] == "unknown_artifact"
        for body, field in [({"name": "shop"}, "version"), ({"name": "../etc", "version": "v1"}, "name"),
                            ({"name": "shop", "version": "v1", "recommender": "magic"}, "recommender")]:
            r = c.put("/v1/serving", json=body, headers=auth(token))
            assert r.status_code == 422 and r.json()["field"] == field, r.text
        answer = c.post(f"/v1/sessions/{session}/clicks", json={"item_id": CLICKS[0]}).json()
    assert answer["artifact"] == "shop/v1" and ids(answer) == offline["v1"].top(CLICKS[:1])[0]


def test_cairn_switch_chooses_what_serves_with_the_token_from_the_environment(fresh_server, monkeypatch, capsys, token):
    from service.cli import main as cairn

    running = fresh_server("memory")
    monkeypatch.setenv("CAIRN_ADMIN_TOKEN", token)
    assert cairn(["switch", "shop/v2", "--recommender", "neighbours", "--url", running.url]) == 0
    assert "now serving shop/v2 with neighbours" in capsys.readouterr().out
    with running.client() as c:
        assert c.get("/v1/artifacts").json()["active"]["artifact"] == "shop/v2"
    # Refusals come back as one line with the service's reason; nothing changes.
    assert cairn(["switch", "shop/v9", "--url", running.url]) == 2
    assert "refused (404)" in capsys.readouterr().err
    assert cairn(["switch", "shop/v0-broken", "--url", running.url]) == 2
    assert "refused (409)" in capsys.readouterr().err
    assert cairn(["switch", "no-slash", "--url", running.url]) == 2
    assert "NAME/VERSION 'no-slash'" in capsys.readouterr().err
    # A URL that is not a base URL is refused before any connection.
    assert cairn(["switch", "shop/v1", "--url", "ftp://127.0.0.1:1"]) == 2
    assert "--url" in capsys.readouterr().err
    monkeypatch.setenv("CAIRN_ADMIN_TOKEN", "wrong-token-0123456789")
    assert cairn(["switch", "shop/v1", "--url", running.url]) == 2
    assert "refused (401)" in capsys.readouterr().err
    with running.client() as c:
        assert c.get("/v1/artifacts").json()["active"]["artifact"] == "shop/v2"
