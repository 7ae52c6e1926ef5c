"""CAIRN_SCORING through the HTTP service: which path answers, and that its answers are the model's."""

from __future__ import annotations

import re

import pytest

from service.config import Settings

CLICKS = ["sku-000001", "sku-000002", "sku-000003"]


def scoring_counts(text: str) -> dict[str, float]:
    return {k: float(v) for k, v in re.findall(r'cairn_gru_scoring_total\{scoring="(\w+)"\} ([\d.e+]+)', text)}


@pytest.mark.parametrize("scoring", ["exact", "fp16", "int8", "int4", "clustered"])
def test_each_path_answers_with_the_models_list_and_is_counted(fresh_server, offline, sid, scoring: str) -> None:
    # clustered: every cluster probed (CAIRN_PROBE_CLUSTERS above the count), so the list must be
    # the exact one; tests/service/runtime/test_clustered_step.py measures a partial probe.
    server = fresh_server("memory", scoring=scoring, probe_clusters=10**6 if scoring == "clustered" else 0)
    session = sid()
    with server.client() as c:
        for item in CLICKS:
            r = c.post(f"/v1/sessions/{session}/clicks", json={"item_id": item, "count": 10})
            assert r.status_code == 200 and r.json()["served_by"] == "gru"
        metrics = c.get("/metrics").text
    answer = r.json()
    want_items, want_scores = offline["v1"].top(CLICKS, 10)  # the exact step, straight from ONNX Runtime
    assert [x["item_id"] for x in answer["items"]] == want_items  # 500 items: the candidates cover the catalogue
    assert [x["score"] for x in answer["items"]] == pytest.approx(want_scores, abs=1e-5)  # exact fp32 scores on every path
    assert scoring_counts(metrics) == {scoring: 3.0}
    with server.client() as c:  # what serves, as the listing and readiness report it
        assert c.get("/v1/artifacts").json()["active"]["scoring"] == scoring
        assert c.get("/readyz").json()["active"]["scoring"] == scoring


def test_int4_int8_counts_each_click_under_the_table_that_scored_it(fresh_server, offline, sid) -> None:
    # The worker times both tables at load: where int4 ranked one row faster, lone clicks read it
    # (and the path is int4+int8); where it did not, the path is plain int8.
    server = fresh_server("memory", scoring="int4+int8")
    session = sid()
    with server.client() as c:
        for item in CLICKS:
            r = c.post(f"/v1/sessions/{session}/clicks", json={"item_id": item, "count": 10})
            assert r.status_code == 200 and r.json()["served_by"] == "gru"
        metrics, ready, listing = c.get("/metrics").text, c.get("/readyz").json()["active"], c.get("/v1/artifacts").json()["active"]
    assert [x["item_id"] for x in r.json()["items"]] == offline["v1"].top(CLICKS, 10)[0]
    assert (ready["scoring"], scoring_counts(metrics)) in [("int4+int8", {"int4": 3.0}), ("int8", {"int8": 3.0})]
    # How many clicks a pass may hold and still read int4, as the worker measured it (none: plain int8).
    assert ready["small_batch_rows"] == listing["small_batch_rows"]
    assert (ready["scoring"] == "int4+int8") == (1 <= (listing["small_batch_rows"] or 0) <= 4)


def test_auto_scores_a_small_catalogue_exactly(fresh_server, sid) -> None:
    server = fresh_server("memory")
    assert server.settings.scoring == "auto"
    with server.client() as c:
        assert c.post(f"/v1/sessions/{sid()}/clicks", json={"item_id": CLICKS[0]}).status_code == 200
        assert scoring_counts(c.get("/metrics").text) == {"exact": 1.0}


def test_an_unknown_scoring_path_is_refused_naming_the_setting(monkeypatch) -> None:
    monkeypatch.setenv("CAIRN_SCORING", "int2")
    with pytest.raises(ValueError, match="scoring"):
        Settings()
