"""The clustered scoring path (inverted-file index) against exact scoring of every item.

Reference: the exact top-N is `numpy.argpartition` over f . v + b in float64 over all items
(NumPy's own selection). Item vectors with structure (items around category directions, as a
trained model's are) are where an inverted-file index is meant to work; random weights have none
(bench/catalogue.py reports them as the worst case).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from offline.export.artifact_writer import write_random_artifact
from offline.export.item_clusters import item_cluster_files
from service.artifacts.format import RowBlocks, load_artifact
from service.artifacts.item_clusters import (
    AUTO_CLUSTERED_AGREEMENT,
    AUTO_CLUSTERED_MAX_SHARE,
    CLUSTER_OFFSETS,
    ITEM_CLUSTER_FILES,
    ClusterFit,
    cluster_fit,
    load_item_clusters,
)
from service.artifacts.item_vectors import load_item_vectors
from service.errors import ArtifactError, StepError
from service.runtime import active
from service.artifacts.item_vectors import REDUCED_FROM
from service.runtime.active import load_model, scoring_path
from service.runtime.clustered_step import ClusteredStep, ClusterSearch
from service.runtime.onnx_step import OnnxStep

TOP = 20


def structured(n: int, d: int, groups: int, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Vectors around `groups` directions, bias, and query features near item directions."""
    rng = np.random.default_rng(seed)
    directions = rng.normal(0, 1, (groups, d))
    vectors = (directions[rng.integers(0, groups, n)] + 0.2 * rng.normal(0, 1, (n, d))).astype(np.float32)
    bias = rng.normal(0, 0.1, n).astype(np.float32)

    def queries(m: int) -> np.ndarray:
        return (directions[rng.integers(0, groups, m)] + 0.4 * rng.normal(0, 1, (m, d))).astype(np.float32)

    return vectors, bias, queries


def write_index(folder: Path, vectors: np.ndarray, bias: np.ndarray, features: np.ndarray) -> dict:
    files, section = item_cluster_files(vectors, bias, features)
    for name, array in files.items():
        np.save(folder / name, np.concatenate(list(array.blocks())) if isinstance(array, RowBlocks) else array)
    return {"item_clusters": section, "files": {name: "-" for name in files}}


def exact_top(q: np.ndarray, vectors: np.ndarray, bias: np.ndarray, k: int) -> np.ndarray:
    scores = q.astype(np.float64) @ vectors.T.astype(np.float64) + bias  # [B, n]
    return np.argpartition(-scores, k - 1, axis=1)[:, :k]


def with_bias_column(f: np.ndarray) -> np.ndarray:
    return np.concatenate([f, np.ones((len(f), 1), np.float32)], axis=1)


def test_search_agrees_with_exact_argpartition_and_returns_exact_scores(tmp_path: Path) -> None:
    vectors, bias, queries = structured(30_000, 16, 40, seed=1)
    manifest = write_index(tmp_path, vectors, bias, queries(512))  # calibration states
    clusters = load_item_clusters(tmp_path, manifest, len(vectors))
    assert clusters is not None and clusters.probe < clusters.n_clusters / 4  # a fraction of the catalogue is read
    f = queries(200)  # fresh states, not the calibration ones
    items, scores = ClusterSearch(clusters).top(with_bias_column(f), TOP)
    truth = exact_top(f, vectors, bias, TOP)
    agreement = np.mean([len(set(a) & set(b)) / TOP for a, b in zip(items.tolist(), truth.tolist())])
    assert agreement >= 0.99, agreement
    want = np.einsum("bkd,bd->bk", vectors[items].astype(np.float64), f.astype(np.float64)) + bias[items]
    np.testing.assert_allclose(scores, want, atol=1e-4)  # exact float32 scores, not approximations
    assert np.all(np.diff(scores, axis=1) <= 0)
    # A batch ranks each row as it would alone (the head's scores are shared by the batch).
    search = ClusterSearch(clusters)
    for row in range(5):
        alone_items, alone_scores = search.top(with_bias_column(f[row : row + 1]), TOP)
        assert alone_items[0].tolist() == items[row].tolist()
        np.testing.assert_allclose(alone_scores[0], scores[row], rtol=1e-6)


def test_probing_every_cluster_is_exact_scoring(tmp_path: Path) -> None:
    vectors, bias, queries = structured(5000, 8, 10, seed=2)
    manifest = write_index(tmp_path, vectors, bias, queries(64))
    clusters = load_item_clusters(tmp_path, manifest, len(vectors), probe=10**6)  # capped at the cluster count
    assert clusters.probe == clusters.n_clusters
    f = queries(50)
    items, _ = ClusterSearch(clusters).top(with_bias_column(f), TOP)
    truth = exact_top(f, vectors, bias, TOP)
    assert all(set(a) == set(b) for a, b in zip(items.tolist(), truth.tolist()))


def test_more_clusters_are_probed_when_the_nearest_hold_too_few_items(tmp_path: Path) -> None:
    vectors, bias, queries = structured(4000, 8, 10, seed=3)
    manifest = write_index(tmp_path, vectors, bias, queries(64))
    clusters = load_item_clusters(tmp_path, manifest, len(vectors), probe=1)
    biggest = int(np.diff(clusters.offsets).max())
    items, scores = ClusterSearch(clusters).top(with_bias_column(queries(3)), biggest + 5)
    assert items.shape == (3, biggest + 5) and all(len(set(row)) == biggest + 5 for row in items.tolist())


def test_a_damaged_index_is_refused_naming_the_file(tmp_path: Path) -> None:
    vectors, bias, queries = structured(3000, 8, 10, seed=4)
    manifest = write_index(tmp_path, vectors, bias, queries(32))
    offsets = np.load(tmp_path / CLUSTER_OFFSETS)
    np.save(tmp_path / CLUSTER_OFFSETS, offsets[::-1].copy())
    with pytest.raises(ArtifactError, match=CLUSTER_OFFSETS):
        load_item_clusters(tmp_path, manifest, len(vectors))
    np.save(tmp_path / CLUSTER_OFFSETS, offsets)
    bad = json.loads(json.dumps(manifest))
    bad["item_clusters"]["probe"] = 0
    with pytest.raises(ArtifactError, match="probe"):
        load_item_clusters(tmp_path, bad, len(vectors))
    assert load_item_clusters(tmp_path, {"files": {}}, len(vectors)) is None  # no index: nothing to load


@pytest.fixture(scope="module")
def artifact(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return write_random_artifact(tmp_path_factory.mktemp("store"), "big", "v1", n_items=3000, hidden_size=32, seed=3, clusters=True)


def test_the_step_runs_the_gru_and_with_every_cluster_probed_ranks_as_the_exact_graph(artifact: Path) -> None:
    a = load_artifact(artifact)
    assert set(ITEM_CLUSTER_FILES) <= set(a.manifest["files"])  # under the checksums
    tables = load_item_vectors(artifact, a.manifest, a.n_items)
    everything = load_item_clusters(artifact, a.manifest, a.n_items, probe=10**6)
    step, exact = ClusteredStep(tables, everything), OnnxStep(a.step_graph)
    rng = np.random.default_rng(0)
    hidden = exact.zero_hidden(16)
    for _ in range(3):
        hidden, _, _ = exact.run(rng.integers(0, a.n_items, 16), hidden, 1)
    items = rng.integers(0, a.n_items, 16)
    got_hidden, got_items, got_scores = step.run(items, hidden, TOP)
    want_hidden, want_items, want_scores = exact.run(items, hidden, TOP)
    np.testing.assert_allclose(got_hidden, want_hidden, atol=1e-6)
    assert got_items.tolist() == want_items.tolist()
    np.testing.assert_allclose(got_scores, want_scores, atol=1e-5)
    for bad_items, top_n in [(np.array([a.n_items]), 5), (np.array([-1]), 5), (np.array([], dtype=np.int64), 5), (np.array([0]), 0)]:
        with pytest.raises(StepError):
            step.run(bad_items, exact.zero_hidden(len(bad_items)), top_n)


def test_scoring_setting_chooses_clustered_only_where_it_was_measured_to_agree_and_to_save(artifact: Path) -> None:
    good = ClusterFit(AUTO_CLUSTERED_AGREEMENT, AUTO_CLUSTERED_MAX_SHARE)
    int4 = {"int4"}
    assert scoring_path("auto", REDUCED_FROM, int4, good) == "clustered"
    assert scoring_path("auto", REDUCED_FROM, int4, ClusterFit(AUTO_CLUSTERED_AGREEMENT - 0.01, 0.1)) == "int4"
    assert scoring_path("auto", REDUCED_FROM, int4, ClusterFit(0.995, 0.8)) == "int4"  # random weights: most clusters probed
    assert scoring_path("auto", REDUCED_FROM - 1, int4, good) == "exact"
    assert scoring_path("clustered", 10, int4, None) == "exact"  # no index in the artifact
    assert scoring_path("clustered", 10, None, good) == "exact"  # no item vectors (an older export)
    assert scoring_path("clustered", 10, set(), ClusterFit(0.5, 1.0)) == "clustered"  # asked for: served, whatever its fit
    model = load_model(artifact, 1, 8, "clustered", probe=2)
    assert model.scoring == "clustered" and model.gru.batcher.step.search.probe == 2


def test_the_fit_comes_from_the_manifest_and_must_match_the_files(tmp_path: Path) -> None:
    vectors, bias, queries = structured(3000, 8, 10, seed=4)
    manifest = write_index(tmp_path, vectors, bias, queries(32))
    section = manifest["item_clusters"]
    fit = cluster_fit(manifest, len(vectors))
    # The share a click reads: the head plus `probe` clusters of average size (by hand from the section).
    by_hand = (section["head"] + section["probe"] * (3000 - section["head"]) / section["clusters"]) / 3000
    assert fit == ClusterFit(section["agreement_top20"], pytest.approx(by_hand))
    assert load_item_clusters(tmp_path, manifest, len(vectors)).fit == fit
    for key, value in [("head", section["head"] + 1), ("clusters", section["clusters"] * 2)]:
        bad = json.loads(json.dumps(manifest))
        bad["item_clusters"][key] = value
        with pytest.raises(ArtifactError, match="the files"):
            load_item_clusters(tmp_path, bad, len(vectors))
    for key, value in [("head", 3000), ("clusters", 0), ("probe", "all"), ("head", True)]:
        bad = json.loads(json.dumps(manifest))
        bad["item_clusters"][key] = value
        with pytest.raises(ArtifactError, match="do not describe an index of 3000 items"):
            cluster_fit(bad, 3000)


def test_other_paths_open_no_index_file(artifact: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # The clustered index is read only by its own path: a model served exactly or from int8 must not
    # depend on the index's files.
    opened: list[str] = []
    real = active.load_item_clusters
    monkeypatch.setattr(active, "load_item_clusters", lambda *a, **k: opened.append("index") or real(*a, **k))
    a = load_artifact(artifact)
    for scoring in ("exact", "int8", "fp16", "auto"):  # 3,000 items: auto is exact
        active.open_step(a, scoring)
    assert opened == []
    assert isinstance(active.open_step(a, "clustered"), ClusteredStep) and opened == ["index"]
