"""A served session-KNN over real HTTP: answers say so, and equal the offline scorer on the artifact's index."""

from __future__ import annotations

import numpy as np

from offline.evaluate.session_knn import SessionKNN

CLICKS = ["sku-000010", "sku-000123", "sku-000042"]


def ids(answer: dict) -> list[str]:
    return [i["item_id"] for i in answer["items"]]


def reference(artifact, clicks: list[str], count: int, exclude_seen: bool) -> list[str]:
    """The offline scorer (checked against scikit-learn and the published definition) on the same index."""
    params = artifact.session_knn
    knn = SessionKNN(artifact.session_index, artifact.popularity.astype(np.int64), params["neighbours"], params["weighting"])
    knn.begin(1)
    for item in clicks:
        scores = knn.advance(np.array([artifact.item_index[item]]))[0]
    order = [artifact.item_ids[i] for i in np.argsort(-scores, kind="stable")]
    return [i for i in order if not (exclude_seen and i in clicks)][:count]


def test_a_served_session_knn_answers_a_visit(fresh_server, offline, sid) -> None:
    artifact = offline["v1"].artifact
    running = fresh_server(recommender="session-knn")
    session = sid()
    with running.client() as c:
        for n in range(1, len(CLICKS) + 1):
            r = c.post(f"/v1/sessions/{session}/clicks", json={"item_id": CLICKS[n - 1], "count": 10})
            assert r.status_code == 200, r.text
            answer = r.json()
            assert answer["served_by"] == "session-knn" and answer["fallback_reason"] is None
            assert ids(answer) == reference(artifact, CLICKS[:n], 10, exclude_seen=True)
        current = c.get(f"/v1/sessions/{session}/recommendations", params={"count": 10, "exclude_seen": "false"}).json()
    assert current["served_by"] == "session-knn"
    assert ids(current) == reference(artifact, CLICKS, 10, exclude_seen=False)


def test_switching_to_session_knn_at_run_time(fresh_server, sid, token) -> None:
    running = fresh_server(admin_token=token)
    with running.client() as c:
        r = c.put("/v1/serving", json={"name": "shop", "version": "v1", "recommender": "session-knn"},
                  headers={"authorization": f"Bearer {token}"})  # fmt: skip
        assert r.status_code == 200, r.text
        answer = c.post(f"/v1/sessions/{sid()}/clicks", json={"item_id": CLICKS[0]}).json()
    assert answer["served_by"] == "session-knn"
