"""Export carries the evaluation's decision: the session-KNN index as tuned (checksummed like every
file) and the exclude-seen choice as the serving default; a served request that omits it follows it."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from offline.evaluate.session_knn import session_index
from offline.export.artifact_writer import export_artifact, write_random_artifact
from offline.model.gru import save_checkpoint
from service.artifacts.format import SESSIONS, load_artifact, verify_artifact
from service.errors import ArtifactError
from tests._support.servers import serve_in_thread, shop_settings
from tests.offline.export.test_artifact_writer import random_model, random_prepared


@pytest.fixture
def exported(tmp_path: Path) -> tuple[Path, object]:
    model = random_model(60, seed=3, embedding_size=8, hidden_size=8)
    checkpoint = tmp_path / "gru.pt"
    save_checkpoint(checkpoint, model, extra={"hyperparameters": {"loss": "top1-max"}})
    data = random_prepared(60, seed=4)
    data.save(tmp_path / "prepared")
    metrics = {
        "session-knn": {"recall@20": {"value": 0.4, "ci95": [0.3, 0.5]}},
        "decision": {
            "session_knn": {"neighbours": 7, "candidates": 9, "weighting": "none", "tuned": True, "trials": []},
            "serving_defaults": {"exclude_seen": False},
            "verdict": {"recommendation": "serve session-knn"},
            "breakdowns": {"session-knn": {}},  # details stay in the report, not in the manifest
        },
    }
    path = export_artifact(checkpoint, tmp_path / "prepared", tmp_path / "store", "garden", "v1", metrics=metrics)
    return path, data


def test_the_decision_becomes_the_session_index_and_the_serving_default(exported) -> None:
    path, data = exported
    manifest = verify_artifact(path)
    assert SESSIONS in manifest["files"]
    assert manifest["session_knn"] == {"neighbours": 7, "candidates": 9, "weighting": "none"}
    assert manifest["serving_defaults"] == {"exclude_seen": False}
    assert "breakdowns" not in manifest["metrics"]["decision"] and manifest["metrics"]["decision"]["verdict"]
    artifact = load_artifact(path)
    assert artifact.exclude_seen is False
    expected = session_index(data.train, 60, 9)
    for name, array in expected.arrays().items():
        np.testing.assert_array_equal(getattr(artifact.session_index, name), array)


def test_a_changed_session_index_is_refused(exported) -> None:
    path, _ = exported
    raw = bytearray((path / SESSIONS).read_bytes())
    raw[len(raw) // 2] ^= 0x01
    (path / SESSIONS).write_bytes(bytes(raw))
    with pytest.raises(ArtifactError, match="sessions.npz"):
        load_artifact(path)


def test_a_request_without_exclude_seen_follows_the_artifact(tmp_path: Path, sid) -> None:
    store = tmp_path / "store"
    write_random_artifact(store, "shop", "v1", n_items=300, hidden_size=8, seed=0, exclude_seen=False)
    with serve_in_thread(shop_settings(store, "memory", tag="x", recommender="session-knn")) as running, running.client() as c:
        session = sid()
        first = c.post(f"/v1/sessions/{session}/clicks", json={"item_id": "sku-000001", "count": 20}).json()
        clicked = first["items"][0]["item_id"]
        second = c.post(f"/v1/sessions/{session}/clicks", json={"item_id": clicked, "count": 100}).json()
        kept = [i["item_id"] for i in second["items"]]
        asked = c.post(f"/v1/sessions/{session}/clicks", json={"item_id": clicked, "count": 100, "exclude_seen": True}).json()
    assert second["served_by"] == "session-knn"
    assert {"sku-000001", clicked} & set(kept)  # the default (false) keeps the visit's items in the list
    assert not {"sku-000001", clicked} & {i["item_id"] for i in asked["items"]}  # the request's own choice wins


def test_a_session_index_that_points_outside_is_refused(tmp_path: Path) -> None:
    from service.artifacts.format import write_artifact
    from service.runtime.session_knn import SessionIndex

    def write(index: SessionIndex, params: dict) -> None:
        write_artifact(tmp_path, "bad", "v1", b"graph", ["a", "b"], np.full((2, 1), -1), np.zeros((2, 1)), np.ones(2),
                       {"session_knn": params}, session_index=index)  # fmt: skip

    good = {"neighbours": 5, "candidates": 2, "weighting": "linear"}
    outside = SessionIndex(np.array([0, 2]), np.array([0, 7], np.int32), np.array([0, 1, 1]), np.array([0], np.int32), 2)
    with pytest.raises(ArtifactError, match="session_items points outside"):
        write(outside, good)
    short = SessionIndex(np.array([0, 2]), np.array([0, 1], np.int32), np.array([0, 1]), np.array([0], np.int32), 2)
    with pytest.raises(ArtifactError, match="covers 1 items"):
        write(short, good)
    sound = SessionIndex(np.array([0, 2]), np.array([0, 1], np.int32), np.array([0, 1, 2]), np.array([0, 0], np.int32), 2)
    with pytest.raises(ArtifactError, match="weighting"):
        write(sound, {**good, "weighting": "cubic"})
    write(sound, good)
    assert load_artifact(tmp_path / "bad" / "v1").session_index.n_sessions == 1
