"""The exported ONNX step graph against the PyTorch model it came from, and the export itself.

Reference for every numeric check here: PyTorch's own `torch.nn.GRU` (documentation: gates r, z, n
stacked in that order in weight_ih_l[k] / weight_hh_l[k]; n = tanh(W_in x + b_in + r * (W_hn h + b_hn)))
run through `NextClickGRU.step` / `score_all`, against ONNX Runtime running the ONNX `GRU` operator
(ONNX Operators.md, GRU: gates z, r, h; linear_before_reset=1 applies the reset gate after R_h h + Rb_h).
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import onnx
import pytest
import torch

from service.artifacts.format import STEP_GRAPH, load_artifact, verify_artifact
from service.artifacts.item_clusters import CLUSTER_VECTORS, ITEM_CLUSTER_FILES
from service.cli import main as cairn
from service.errors import ArtifactError, InputDataError
from offline.data.dataset import PreparedData, SessionSplit
from offline.evaluate.next_clicks import iterate_events, target_ranks
from offline.export.artifact_writer import export_artifact, write_random_artifact
from offline.export.onnx_graph import build_step_graph
from offline.model.gru import GRUConfig, NextClickGRU, save_checkpoint
from offline.evaluate.onnx_scorer import load_onnx_scorer
from service.runtime.onnx_step import OnnxStep
from service.errors import StepError

TOL = 1e-4

CONFIGS = {
    "1-layer": dict(embedding_size=16, hidden_size=24, layers=1),
    "2-layer": dict(embedding_size=16, hidden_size=24, layers=2),
    "1-layer-ff-tied": dict(embedding_size=16, hidden_size=24, layers=1, ff_sizes=[16], tie_output=True),
    "2-layer-2ff-tied": dict(embedding_size=16, hidden_size=24, layers=2, ff_sizes=[20, 16], tie_output=True),
    "2-layer-tied": dict(embedding_size=20, hidden_size=20, layers=2, tie_output=True),
    "1-layer-ff": dict(embedding_size=16, hidden_size=24, layers=1, ff_sizes=[12]),
}


def random_model(n_items: int, seed: int, **sizes) -> NextClickGRU:
    torch.manual_seed(seed)
    model = NextClickGRU(GRUConfig(n_items=n_items, **sizes)).eval()
    with torch.no_grad():
        # The model starts its output bias at zero; give it values so the graph's bias is tested too.
        model.output_bias.weight.normal_(0.0, 0.1)
    return model


def step_of(model: NextClickGRU, tmp_path: Path) -> OnnxStep:
    path = tmp_path / "step.onnx"
    path.write_bytes(build_step_graph(model))
    return OnnxStep(path)


def torch_step(model: NextClickGRU, items: np.ndarray, hidden: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    with torch.no_grad():
        f, h = model.step(torch.from_numpy(items), torch.from_numpy(hidden))
        return h.numpy(), model.score_all(f).numpy()


def assert_same_top(onnx_items: np.ndarray, onnx_scores: np.ndarray, torch_scores: np.ndarray, k: int) -> None:
    """Top-k lists identical, except where two items' reference scores tie (within float error)."""
    ref = torch.topk(torch.from_numpy(torch_scores), k)  # reference ranking: torch.topk, sorted
    ref_items, ref_scores = ref.indices.numpy(), ref.values.numpy()
    np.testing.assert_allclose(onnx_scores, ref_scores, atol=TOL, rtol=0)
    assert np.all(np.diff(onnx_scores, axis=1) <= 0), "top_scores must be descending"
    rows, cols = np.nonzero(onnx_items != ref_items)
    for r, c in zip(rows, cols):
        a, b = torch_scores[r, onnx_items[r, c]], torch_scores[r, ref_items[r, c]]
        assert abs(a - b) < TOL, f"row {r} position {c}: item {onnx_items[r, c]} ({a}) vs {ref_items[r, c]} ({b}) is no tie"


@pytest.mark.parametrize("sizes", CONFIGS.values(), ids=CONFIGS.keys())
def test_graph_equals_torch_on_random_sessions(sizes: dict, tmp_path: Path) -> None:
    n_items, k = 300, 10
    model = random_model(n_items, seed=len(str(sizes)), **sizes)
    step = step_of(model, tmp_path)
    assert (step.layers, step.hidden_size, step.n_items) == (model.config.layers, model.config.hidden_size, n_items)

    rng = np.random.default_rng(7)
    lengths = rng.integers(1, 13, size=9)  # random session lengths
    sessions = [rng.integers(0, n_items, size=n) for n in lengths]
    hidden_onnx = step.zero_hidden(len(sessions))  # [L, B, H]
    hidden_torch = hidden_onnx.copy()
    for t in range(int(lengths.max())):
        # Sessions that have ended repeat their last click, as the evaluator feeds them.
        items = np.array([s[min(t, len(s) - 1)] for s in sessions], dtype=np.int64)  # [B]
        ref_hidden, ref_scores = torch_step(model, items, hidden_torch)
        next_hidden, top_items, top_scores = step.run(items, hidden_onnx, k)
        scored_hidden, scores = step.run_scores(items, hidden_onnx)
        np.testing.assert_allclose(next_hidden, ref_hidden, atol=TOL, rtol=0)
        np.testing.assert_allclose(scores, ref_scores, atol=TOL, rtol=0)
        np.testing.assert_array_equal(scored_hidden, next_hidden)
        assert top_items.dtype == np.int64 and top_items.shape == (len(sessions), k)
        assert_same_top(top_items, top_scores, ref_scores, k)
        hidden_onnx, hidden_torch = next_hidden, ref_hidden

    # The batch dimension is dynamic: one session alone gives the same as inside the batch.
    s = sessions[int(np.argmax(lengths))]
    h1, h_ref = step.zero_hidden(1), step.zero_hidden(1)
    for item in s:
        h1, top1, _ = step.run(np.array([item], dtype=np.int64), h1, k)
        h_ref, ref_scores = torch_step(model, np.array([item], dtype=np.int64), h_ref)
    np.testing.assert_allclose(h1, h_ref, atol=TOL, rtol=0)
    np.testing.assert_allclose(h1[:, 0], hidden_onnx[:, int(np.argmax(lengths))], atol=TOL, rtol=0)


def test_graph_follows_the_contract() -> None:
    model = random_model(50, seed=1, embedding_size=8, hidden_size=12, layers=2, ff_sizes=[8])
    proto = onnx.load_from_string(build_step_graph(model))
    onnx.checker.check_model(proto, full_check=True)  # ONNX's own validator

    def dims(v: onnx.ValueInfoProto) -> list:
        return [d.dim_value if d.HasField("dim_value") else d.dim_param for d in v.type.tensor_type.shape.dim]

    inputs = {v.name: (v.type.tensor_type.elem_type, dims(v)) for v in proto.graph.input}
    outputs = {v.name: (v.type.tensor_type.elem_type, dims(v)) for v in proto.graph.output}
    T = onnx.TensorProto
    assert inputs == {"items": (T.INT64, ["batch"]), "hidden": (T.FLOAT, [2, "batch", 12]), "top_n": (T.INT64, [1])}
    assert outputs == {
        "next_hidden": (T.FLOAT, [2, "batch", 12]),
        "top_items": (T.INT64, ["batch", "top_n"]),
        "top_scores": (T.FLOAT, ["batch", "top_n"]),
        "scores": (T.FLOAT, ["batch", 50]),
    }
    grus = [n for n in proto.graph.node if n.op_type == "GRU"]
    assert len(grus) == 2
    for node in grus:
        attrs = {a.name: onnx.helper.get_attribute_value(a) for a in node.attribute}
        assert attrs["linear_before_reset"] == 1 and attrs["hidden_size"] == 12
    inits = {t.name: list(t.dims) for t in proto.graph.initializer}
    assert inits["output"] == [50, 8]  # O [n_items, D], the layout of item_vectors.npy (Gemm transB)
    topk = next(n for n in proto.graph.node if n.op_type == "TopK")
    assert {a.name: a.i for a in topk.attribute} == {"axis": -1, "largest": 1, "sorted": 1}


def test_linear_before_reset_matters(tmp_path: Path) -> None:
    # A negative control: with ONNX's other GRU form (linear_before_reset=0) the states differ from
    # torch's, so the equality above really pins down the form and is no accident of small weights.
    model = random_model(40, seed=3, embedding_size=8, hidden_size=8, layers=1)
    proto = onnx.load_from_string(build_step_graph(model))
    for node in proto.graph.node:
        if node.op_type == "GRU":
            for a in node.attribute:
                if a.name == "linear_before_reset":
                    a.i = 0
    path = tmp_path / "other.onnx"
    path.write_bytes(proto.SerializeToString())
    step = OnnxStep(path)
    items = np.arange(10, dtype=np.int64)
    hidden = np.random.default_rng(0).uniform(-1, 1, size=(1, 10, 8)).astype(np.float32)
    ref_hidden, _ = torch_step(model, items, hidden)
    got, _ = step.run_scores(items, hidden)
    assert np.abs(got - ref_hidden).max() > 10 * TOL


class TorchLoop:
    """A SessionScorer straight from the model's step/score_all (independent of the ONNX path)."""

    def __init__(self, model: NextClickGRU) -> None:
        self.model, self.name, self.n_items = model, "torch", model.config.n_items

    def begin(self, n_sessions: int) -> None:
        self.hidden = self.model.init_hidden(n_sessions)  # [L, n, H]

    def advance(self, items: np.ndarray) -> np.ndarray:
        with torch.no_grad():
            f, self.hidden = self.model.step(torch.from_numpy(items.astype(np.int64)), self.hidden)
            return self.model.score_all(f).numpy()


def random_prepared(n_items: int, seed: int) -> PreparedData:
    rng = np.random.default_rng(seed)

    def split(n_sessions: int) -> SessionSplit:
        return SessionSplit.from_sessions([rng.integers(0, n_items, size=rng.integers(1, 9)) for _ in range(n_sessions)])

    return PreparedData(train=split(150), valid=split(20), test=split(60), item_ids=[f"plant-{i}" for i in range(n_items)])


@pytest.fixture
def trained(tmp_path: Path) -> tuple[NextClickGRU, Path, Path, PreparedData]:
    n_items = 120
    model = random_model(n_items, seed=11, embedding_size=16, hidden_size=16, layers=2, ff_sizes=[16], tie_output=True)
    checkpoint = tmp_path / "gru.pt"
    save_checkpoint(checkpoint, model, extra={"hyperparameters": {"loss": "bpr-max", "batch_size": 32}})
    data = random_prepared(n_items, seed=5)
    data.save(tmp_path / "prepared")
    return model, checkpoint, tmp_path / "prepared", data


def test_export_artifact_writes_what_the_model_and_data_say(trained, tmp_path: Path) -> None:
    model, checkpoint, data_dir, data = trained
    row = lambda r, m: {"recall@20": {"value": r, "ci95": [r - 0.01, r + 0.01]}, "mrr@20": {"value": m, "ci95": [m - 0.01, m + 0.01]}, "events": 90}  # noqa: E731
    metrics = {
        "gru-bpr-max": row(0.31, 0.12), "gru-top1-max": row(0.35, 0.14), "markov": row(0.28, 0.10), "pop": row(0.05, 0.01),
        "decision": {"verdict": {"strongest_simple": "markov", "recommendation": "serve the GRU"}, "breakdowns": {"big": "stays out"}},
        "provenance": {"checkpoints": {"gru-top1-max": "elsewhere.pt", "gru-bpr-max": str(checkpoint)}, "split": "test", "seed": 0},
    }
    path = export_artifact(checkpoint, data_dir, tmp_path / "store", "garden", "v1", neighbours=7, metrics=metrics)
    assert path == tmp_path / "store" / "garden" / "v1"
    manifest = verify_artifact(path)
    assert manifest["data_fingerprint"] == data.fingerprint()
    assert manifest["model"] == {
        "kind": "gru", "n_items": 120, "embedding_size": 16, "hidden_size": 16, "layers": 2, "ff_sizes": [16], "tie_output": True,
    }
    assert manifest["hyperparameters"] == {"loss": "bpr-max", "batch_size": 32}
    # Its own figures (the row of this checkpoint, not the better one of another), the strongest
    # simple recommender's beside them, the verdict and where they come from; nothing else.
    recorded = manifest["metrics"]
    assert recorded["model"] == {"name": "gru-bpr-max", "recall@20": metrics["gru-bpr-max"]["recall@20"], "mrr@20": metrics["gru-bpr-max"]["mrr@20"]}
    assert recorded["strongest_simple"]["name"] == "markov" and recorded["strongest_simple"]["recall@20"]["value"] == 0.28
    assert recorded["decision"] == {"verdict": metrics["decision"]["verdict"]} and recorded["provenance"] == {"split": "test", "seed": 0}
    assert "gru-top1-max" not in json.dumps(recorded["model"]) and len(json.dumps(recorded)) < 2000
    artifact = load_artifact(path)
    assert artifact.item_ids == data.item_ids
    # Popularity is the training clicks per item, counted here with a plain Python loop.
    counts = np.zeros(120)
    for item in data.train.items:
        counts[item] += 1
    np.testing.assert_array_equal(artifact.popularity, counts)
    assert artifact.neighbour_items.shape == (120, 7) and artifact.neighbour_items.dtype == np.int32
    from offline.evaluate.baselines import ItemKNN

    knn_items, knn_scores = ItemKNN.fit(data.train, 120, neighbours=7, regulariser=20.0).neighbour_table()
    np.testing.assert_array_equal(artifact.neighbour_items, knn_items)
    np.testing.assert_array_equal(artifact.neighbour_scores, knn_scores)


def test_onnx_evaluation_equals_torch_evaluation(trained, tmp_path: Path) -> None:
    model, checkpoint, data_dir, data = trained
    path = export_artifact(checkpoint, data_dir, tmp_path / "store", "garden", "v1", neighbours=5)
    scorer = load_onnx_scorer(path)
    assert scorer.name == "gru-bpr-max-onnx" and scorer.n_items == 120

    def events(s) -> tuple[np.ndarray, np.ndarray, list[np.ndarray], np.ndarray]:
        batches = list(iterate_events(s, data.test, batch_size=16))
        keys = np.concatenate([b.sessions * 1000 + b.positions for b in batches])
        ranks = np.concatenate([target_ranks(b.scores, b.targets) for b in batches])
        scores = [b.scores.copy() for b in batches]
        targets = np.concatenate([b.targets for b in batches])
        return keys, ranks, scores, targets

    onnx_keys, onnx_ranks, _, _ = events(scorer)
    torch_keys, torch_ranks, torch_scores, targets = events(TorchLoop(model))
    np.testing.assert_array_equal(onnx_keys, torch_keys)
    assert len(onnx_ranks) == data.test.n_clicks - int((data.test.lengths() >= 1).sum())  # every click after the first
    ref = np.concatenate(torch_scores)
    for e in np.nonzero(onnx_ranks != torch_ranks)[0]:
        # A rank may only move across items whose reference score ties the target's (float error).
        near = np.abs(ref[e] - ref[e, targets[e]]) < TOL
        assert abs(int(onnx_ranks[e]) - int(torch_ranks[e])) < near.sum(), f"event {e}: ranks {onnx_ranks[e]} vs {torch_ranks[e]}"


def test_each_scoring_path_is_evaluated_as_it_serves(trained, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    # `cairn evaluate --artifact P --scoring ...`: a row per path. int8 and int4 re-score their 512
    # candidates exactly, and 512 candidates cover these 120 items, so their figures must equal the exact row's.
    _, checkpoint, data_dir, _ = trained
    path = export_artifact(checkpoint, data_dir, tmp_path / "store", "garden", "v1", neighbours=5, clusters=True, precisions=("int8", "int4"))
    out = tmp_path / "eval.json"
    argv = ["evaluate", "--data", str(data_dir), "--recommenders", "pop", "--artifact", str(path), "--scoring", "exact", "int8", "int4", "clustered", "clustered@1000"]
    assert cairn([*argv, "--bootstrap", "20", "--cost-clicks", "0", "--out", str(out)]) == 0
    report = json.loads(out.read_text())
    rows = [n for n in report if n.startswith("gru")]
    assert rows == ["gru-bpr-max-onnx", "gru-bpr-max-onnx-int8", "gru-bpr-max-onnx-int4", "gru-bpr-max-onnx-clustered", "gru-bpr-max-onnx-clustered@1000"]
    exact = report["gru-bpr-max-onnx"]
    # clustered@1000 probes every cluster: the exact top 100, as CAIRN_PROBE_CLUSTERS=1000 serves it.
    for reduced in (report["gru-bpr-max-onnx-int8"], report["gru-bpr-max-onnx-int4"], report["gru-bpr-max-onnx-clustered@1000"]):
        assert reduced["recall@20"]["value"] == exact["recall@20"]["value"]
        assert reduced["mrr@20"]["value"] == pytest.approx(exact["mrr@20"]["value"], abs=1e-9)
    assert 0 < report["gru-bpr-max-onnx-clustered"]["recall@20"]["value"] <= 1
    assert report["provenance"]["artifacts"] == {r: str(path) for r in rows}
    capsys.readouterr()
    for bad in ("int2", "clustered@0", "int8@4"):
        with pytest.raises(SystemExit) as refused:  # argparse's usage error, exit status 2
            cairn([*argv[:-6], "--scoring", bad])
        assert refused.value.code == 2
        err = capsys.readouterr().err
        assert "--scoring" in err and repr(bad) in err
    # An artifact without the index: a clustered row would be the exact one under another name, so it is refused.
    bare = export_artifact(checkpoint, data_dir, tmp_path / "store", "garden", "v2", neighbours=5, clusters=False)
    assert cairn(["evaluate", "--data", str(data_dir), "--recommenders", "pop", "--artifact", str(bare), "--scoring", "clustered",
                  "--bootstrap", "20", "--cost-clicks", "0", "--out", str(tmp_path / "eval2.json")]) == 2  # fmt: skip
    assert f"--scoring clustered: {bare} has no files for that path" in capsys.readouterr().err


def test_export_refuses_a_checkpoint_of_another_data_set(trained, tmp_path: Path) -> None:
    _, checkpoint, _, _ = trained
    other = random_prepared(90, seed=6)
    other.save(tmp_path / "other")
    with pytest.raises(InputDataError, match="120 items but .* has 90"):
        export_artifact(checkpoint, tmp_path / "other", tmp_path / "store", "garden", "v1")
    with pytest.raises(ArtifactError, match="no checkpoint file"):
        export_artifact(tmp_path / "missing.pt", tmp_path / "other", tmp_path / "store", "garden", "v1")
    (tmp_path / "junk.pt").write_bytes(b"not a checkpoint")
    with pytest.raises(ArtifactError, match="not a readable cairn GRU checkpoint"):
        export_artifact(tmp_path / "junk.pt", tmp_path / "other", tmp_path / "store", "garden", "v1")


def test_random_artifact_is_sound(tmp_path: Path) -> None:
    path = write_random_artifact(tmp_path, "bench", "v1", n_items=500, hidden_size=12, layers=2, neighbours=9, seed=4)
    artifact = load_artifact(path)
    step = OnnxStep(path / STEP_GRAPH)
    assert (step.layers, step.hidden_size, step.n_items, artifact.n_items) == (2, 12, 500, 500)
    table = artifact.neighbour_items
    assert table.shape == (500, 9) and table.min() >= 0 and table.max() < 500
    assert not np.any(table == np.arange(500)[:, None]), "an item is not its own neighbour"
    assert all(len(set(row)) == 9 for row in table.tolist()), "neighbours of an item are distinct"
    assert np.all(np.diff(artifact.neighbour_scores, axis=1) <= 0)
    _, top, _ = step.run(np.array([3, 4], dtype=np.int64), step.zero_hidden(2), 20)
    assert top.shape == (2, 20)


def test_step_errors_name_the_bad_value(tmp_path: Path) -> None:
    step = step_of(random_model(30, seed=2, embedding_size=8, hidden_size=8), tmp_path)
    h = step.zero_hidden(2)
    with pytest.raises(StepError, match="int32"):
        step.run(np.array([1, 2], dtype=np.int32), h, 5)
    with pytest.raises(StepError, match="largest index 30"):
        step.run(np.array([1, 30]), h, 5)
    with pytest.raises(StepError, match="got -1"):
        step.run(np.array([1, -1]), h, 5)
    with pytest.raises(StepError, match=r"hidden float32 \[1, 3, 8\]"):
        step.run(np.array([1, 2]), step.zero_hidden(3), 5)
    with pytest.raises(StepError, match="empty batch|at least one session"):
        step.run_scores(np.zeros(0, dtype=np.int64), step.zero_hidden(0))
    for bad in (0, 31):
        with pytest.raises(StepError, match=f"top_n must be an integer from 1 to 30, got {bad}"):
            step.run(np.array([1, 2]), h, bad)


def test_step_refuses_graphs_that_are_not_cairn_steps(tmp_path: Path) -> None:
    (tmp_path / "junk.onnx").write_bytes(b"\x08\x07garbage")
    with pytest.raises(ArtifactError, match="cannot open the step graph"):
        OnnxStep(tmp_path / "junk.onnx")
    with pytest.raises(ArtifactError, match="cannot open the step graph"):
        OnnxStep(tmp_path / "absent.onnx")
    h = onnx.helper
    graph = h.make_graph(
        [h.make_node("Identity", ["x"], ["y"])],
        "other",
        [h.make_tensor_value_info("x", onnx.TensorProto.FLOAT, [1])],
        [h.make_tensor_value_info("y", onnx.TensorProto.FLOAT, [1])],
    )
    model = h.make_model(graph, opset_imports=[h.make_opsetid("", 17)])
    model.ir_version = 8
    (tmp_path / "other.onnx").write_bytes(model.SerializeToString())
    with pytest.raises(ArtifactError, match="not a cairn step graph"):
        OnnxStep(tmp_path / "other.onnx")


def test_export_cli(trained, tmp_path: Path, capsys) -> None:
    _, checkpoint, data_dir, _ = trained
    store = tmp_path / "store"
    metrics = tmp_path / "evaluation.json"
    metrics.write_text(json.dumps({"gru-x": {"recall@20": {"value": 0.4, "ci95": [0.3, 0.5]}}, "provenance": {"checkpoints": {"gru-x": str(checkpoint)}}}))
    args = ["export", "--checkpoint", str(checkpoint), "--data", str(data_dir), "--artifacts", str(store), "--name", "garden"]
    assert cairn([*args, "--knn-neighbours", "4", "--metrics", str(metrics)]) == 0
    (written,) = (store / "garden").iterdir()
    assert re.fullmatch(r"\d{8}T\d{6}", written.name), "default version: a UTC timestamp"
    manifest = verify_artifact(written)
    assert manifest["metrics"]["model"] == {"name": "gru-x", "recall@20": {"value": 0.4, "ci95": [0.3, 0.5]}}
    assert manifest["neighbour_table"]["neighbours"] == 4
    other = tmp_path / "other.json"  # a report of another checkpoint: its figures are not this model's
    other.write_text(json.dumps({"gru-y": {"recall@20": {"value": 0.9, "ci95": [0.8, 1.0]}}, "provenance": {"checkpoints": {"gru-y": "other.pt"}}}))
    assert cairn([*args, "--version", "v-other", "--metrics", str(other)]) == 2
    assert f"did not evaluate {checkpoint}" in capsys.readouterr().err
    assert cairn([*args, "--version", written.name]) == 2
    assert "exists already" in capsys.readouterr().err
    assert cairn([*args, "--version", written.name, "--overwrite"]) == 0

    assert cairn(["export", "--random", "--items", "200", "--hidden-size", "8", "--artifacts", str(store), "--name", "bench", "--version", "r1"]) == 0
    assert load_artifact(store / "bench" / "r1").n_items == 200
    capsys.readouterr()
    # Random weights have nothing to cluster: the automatic export says so and builds no index; `always` builds it.
    random_args = ["export", "--random", "--items", "3000", "--hidden-size", "8", "--artifacts", str(store), "--name", "bench"]
    assert cairn([*random_args, "--version", "r2"]) == 0
    assert "no clustered index: 99.9% top-20 agreement needs" in capsys.readouterr().out
    manifest = verify_artifact(store / "bench" / "r2")
    assert "item_clusters" not in manifest and manifest["item_clusters_skipped"]["probe_needed"] > 1
    assert not set(ITEM_CLUSTER_FILES) & set(manifest["files"]) and not (store / "bench" / "r2" / CLUSTER_VECTORS).exists()
    assert cairn([*random_args, "--version", "r3", "--clustered-index", "always"]) == 0
    manifest = verify_artifact(store / "bench" / "r3")
    assert "item_clusters_skipped" not in manifest and manifest["item_clusters"]["probe"] >= 1 and set(ITEM_CLUSTER_FILES) <= set(manifest["files"])
    assert cairn([*random_args, "--version", "r4", "--clustered-index", "never"]) == 0
    manifest = verify_artifact(store / "bench" / "r4")
    assert "item_clusters" not in manifest and "item_clusters_skipped" not in manifest
    capsys.readouterr()

    for bad, says in (
        (["export", "--checkpoint", str(checkpoint), "--artifacts", str(store), "--name", "g"], "--data is required"),
        ([*args, "--items", "10"], "--items only go with --random"),
        (["export", "--random", "--artifacts", str(store), "--name", "../x"], "artifact name '../x'"),
        ([*args, "--metrics", str(tmp_path / "nope.json")], "nope.json: no metrics file"),
    ):
        assert cairn(bad) == 2
        err = capsys.readouterr().err
        assert says in err and err.count("\n") == 1, err
    with pytest.raises(SystemExit) as exit_info:  # argparse: --random and --checkpoint exclude each other
        cairn(["export", "--random", "--checkpoint", str(checkpoint), "--name", "g"])
    assert exit_info.value.code == 2


def test_export_names_from_a_catalogue_csv(trained, tmp_path: Path, capsys) -> None:
    _, checkpoint, data_dir, data = trained
    catalogue = tmp_path / "catalogue.csv"
    # A catalogue as `cairn demo-data` writes it: more items than the prepared data kept, and a
    # name with a comma (quoted, RFC 4180).
    rows = ["item_id,name,category", *(f"{i},Seed tray {i},propagation" for i in data.item_ids[:100]), 'gone-1,"Rake, wide",tools']
    catalogue.write_text("\n".join(rows) + "\n", encoding="utf-8")
    store = tmp_path / "store"
    args = ["export", "--checkpoint", str(checkpoint), "--data", str(data_dir), "--artifacts", str(store), "--name", "garden"]
    assert cairn([*args, "--version", "n1", "--names", str(catalogue)]) == 0
    names = load_artifact(store / "garden" / "n1").item_names
    assert names == {i: f"Seed tray {i}" for i in data.item_ids[:100]}  # the 20 unnamed items show their ids; gone-1 is left out
    capsys.readouterr()

    (tmp_path / "bad.csv").write_text("id,title\nplant-1,Rake\n", encoding="utf-8")
    for bad, says in (
        ([*args, "--version", "n2", "--names", str(tmp_path / "bad.csv")], "no item_id or name column"),
        ([*args, "--version", "n2", "--names", str(tmp_path / "nope.csv")], "nope.csv: no names file"),
        (["export", "--random", "--artifacts", str(store), "--name", "g", "--names", str(catalogue)], "--random takes none of them"),
    ):
        assert cairn(bad) == 2
        err = capsys.readouterr().err
        assert says in err and err.count("\n") == 1, err


def test_random_artifact_weights_follow_the_training_init_and_the_seed(tmp_path: Path) -> None:
    # Built on the meta device (no throw-away init of the item tables), the weights must still be
    # the training init: the tables uniform within +-sqrt(6 / (fan_in + fan_out)) (NextClickGRU),
    # the bias zero, and the GRU's one-dimensional biases PyTorch's own nn.GRU init, uniform within
    # +-1/sqrt(hidden) (the nn.GRU documentation) -- not whatever memory held.
    from offline.export.artifact_writer import random_model as export_random_model
    from offline.model.gru import GRUConfig

    config = GRUConfig(n_items=400, embedding_size=12, hidden_size=12)
    model = export_random_model(config, seed=3)
    bound = (6.0 / (400 + 12)) ** 0.5
    table = model.embedding.weight.detach().numpy()
    assert np.abs(table).max() <= bound and table.std() > bound / 3  # spread over the range, not zeros
    assert not model.output_bias.weight.detach().numpy().any()
    gru_bias = model.gru.bias_ih_l0.detach().numpy()
    assert np.abs(gru_bias).max() <= 1 / 12**0.5 and gru_bias.std() > 0
    again = export_random_model(config, seed=3)
    assert all(np.array_equal(a.detach().numpy(), b.detach().numpy()) for a, b in zip(model.parameters(), again.parameters()))
    other = export_random_model(config, seed=4)
    assert not np.array_equal(other.embedding.weight.detach().numpy(), table)


def test_the_reduced_copies_written_block_by_block_are_the_whole_table_conversions(tmp_path: Path) -> None:
    # The fp16 and int8 files are written a block of dimensions at a time; they must hold exactly
    # numpy's own conversion of the whole table (astype float16, transposed) and the quantisation
    # rule applied to the whole table (round(v / scale), clipped to -63..63, transposed).
    from offline.export.onnx_graph import INT8_LEVELS, int8_scales
    from service.artifacts.item_vectors import ITEM_SCALES, ITEM_VECTORS, ITEM_VECTORS_FP16, ITEM_VECTORS_INT8

    path = write_random_artifact(tmp_path, "bench", "v1", n_items=9000, hidden_size=60, seed=2, precisions=("fp16", "int8"))  # 60 dims: blocks of 25, 25, 10
    vectors = np.load(path / ITEM_VECTORS)
    assert np.array_equal(np.load(path / ITEM_VECTORS_FP16), vectors.astype(np.float16).T)
    scales = np.load(path / ITEM_SCALES)
    assert np.array_equal(scales, int8_scales(vectors))
    codes = np.clip(np.rint(vectors / scales[:, None]), -INT8_LEVELS, INT8_LEVELS).astype(np.int8).T
    assert np.array_equal(np.load(path / ITEM_VECTORS_INT8), codes)
