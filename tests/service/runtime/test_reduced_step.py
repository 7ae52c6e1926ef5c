"""Reduced-precision scoring (fp16, int8, int4 + exact re-scoring) against exact float32 scoring.

References: the exact top-N is `numpy.argpartition` over f . v + b in float64 (NumPy's own
selection); the int8 error bound is the usual one for symmetric per-vector quantisation
(common practice): with v = s c + e_v, |e_v| <= s/2 per coordinate, and the features quantised
as ONNX's DynamicQuantizeLinear specifies (see the int8 test), |f.v - approx| <= ||f||_1 s/2 +
||v_hat||_1 max|e_f|.
int4 follows the same rule per block of 32 coordinates; the features are quantised to int8 inside
ONNX Runtime's MatMulNBits (accuracy_level 4), per block, so a step of at most max|f| / 127
(a whole-row scale bounds every block's): |f.v - approx| <= ||f||_1 s_v/2 + ||v_hat||_1 s_f/2
summed over blocks, v_hat the dequantised vector. The packed layout (two codes a byte, low half
first, zero point 8) is ONNX Runtime's for MatMulNBits (its contrib operator documentation);
that the operator's results meet the bound checks the layout against ONNX Runtime itself.
"""

from __future__ import annotations

import asyncio
import time
from pathlib import Path

import numpy as np
import onnx
import pytest

from offline.export.artifact_writer import write_random_artifact
from service.artifacts.format import load_artifact, write_artifact
from service.artifacts.item_vectors import DEFAULT_PRECISIONS, INT4_BLOCK, REDUCED_FROM, default_precisions, ITEM_VECTOR_FILES, PRECISION_FILES, PRECISIONS, load_item_vectors
from service.errors import ArtifactError, StepError
from service.runtime.active import load_model, scoring_path
from service.runtime.onnx_step import OnnxStep, open_session
from service.runtime.reduced_step import SMALL_BATCH_MAX, ReducedStep, candidates_for

N_ITEMS, HIDDEN, TOP = 3000, 32, 20


@pytest.fixture(scope="module")
def artifact(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return write_random_artifact(tmp_path_factory.mktemp("store"), "big", "v1", n_items=N_ITEMS, hidden_size=HIDDEN, seed=3, precisions=PRECISIONS)


def visit_states(step: OnnxStep, n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """(items [n], hidden [L, n, H]) after one to four random clicks: real visit states, not noise."""
    rng = np.random.default_rng(seed)
    hidden = step.zero_hidden(n)
    for _ in range(rng.integers(1, 5)):
        hidden, _, _ = step.run(rng.integers(0, step.n_items, n), hidden, 1)
    return rng.integers(0, step.n_items, n), hidden


def exact_top(features: np.ndarray, vectors: np.ndarray, bias: np.ndarray, k: int) -> np.ndarray:
    scores = features.astype(np.float64) @ vectors.T.astype(np.float64) + bias  # [B, n_items]
    return np.argpartition(-scores, k - 1, axis=1)[:, :k]  # the k best of each row, any order


def test_int8_scores_stay_within_the_quantisation_bound(artifact: Path) -> None:
    # The packed graph quantises the batch of features as ONNX's DynamicQuantizeLinear does (the
    # ONNX operator specification): uint8, one scale for the whole tensor, s_f = (max(f, 0) -
    # min(f, 0)) / 255, so |f - f_hat| <= s_f (half a step from rounding, up to a whole one where
    # the rounded zero point saturates the end of the range). Then
    # |f.v - approx| <= ||f||_1 s_v / 2 + ||v_hat||_1 s_f.
    a = load_artifact(artifact)
    t = load_item_vectors(artifact, a.manifest, a.n_items)
    assert "int8" in t.packed and a.manifest["item_vectors"]["packed"] == ["int8", "int4"]
    features = np.random.default_rng(0).normal(0, 1, (8, HIDDEN)).astype(np.float32)
    features[3] *= 0.05  # a quiet row beside loud ones: the batch's one scale is the loud rows'
    k = np.array([a.n_items], dtype=np.int64)  # every item, so every approximate score comes back
    cand, approx = ReducedStep(t, "int8")._candidates.run(None, {"features": features, "bias": t.bias, "k": k})
    exact = features.astype(np.float64) @ np.asarray(t.vectors, dtype=np.float64).T + t.bias  # [8, n]
    s_f = (max(features.max(), 0.0) - min(features.min(), 0.0)) / 255.0
    v_hat = np.asarray(t.codes["int8"], dtype=np.float64).T * t.scales[:, None]  # [n, D]
    bound = np.abs(features).sum(1, keepdims=True) * t.scales[None, :] / 2 + np.abs(v_hat).sum(1)[None, :] * s_f + 1e-4  # [8, n]
    err = np.abs(approx - np.take_along_axis(exact, cand, 1))
    bound = np.take_along_axis(bound, cand, 1)
    assert np.all(err <= bound), float((err - bound).max())
    assert err.max() > 0.1 * bound.max()  # an approximation that comes near its bound, not one that never does
    # Read-only memory maps of the artifact's files, not copies: workers share the pages.
    for table in (t.embedding, t.vectors, t.codes["int8"], t.codes["fp16"]):
        assert isinstance(table, np.memmap) and not table.flags.writeable
    # The stored codes reproduce the vectors within half a step per coordinate.
    recon = np.asarray(t.codes["int8"], dtype=np.float32).T * t.scales[:, None]
    assert np.all(np.abs(recon - t.vectors) <= t.scales[:, None] / 2 + 1e-7)


def test_an_int8_graph_exported_before_it_was_packed_is_fed_its_table(artifact: Path, tmp_path: Path) -> None:
    # Artifacts from before: a manifest without `packed`, and an int8 graph taking the table as an
    # input (MatMulInteger over uint8 features, zero point 128, scaled per row and per item). Such
    # a graph is laid out here from the ONNX operator specification, not by cairn's export.
    from onnx import TensorProto, helper, numpy_helper

    a = load_artifact(artifact)
    older = {**a.manifest, "item_vectors": {k: v for k, v in a.manifest["item_vectors"].items() if k != "packed"}}
    t = load_item_vectors(artifact, older, a.n_items)
    assert t.packed == {"int4"}
    v = lambda name, kind, shape: helper.make_tensor_value_info(name, kind, shape)  # noqa: E731
    graph = helper.make_graph(
        [
            helper.make_node("MatMulInteger", ["features", "codes", "zero"], ["acc"]),
            helper.make_node("Cast", ["acc"], ["acc_f"], to=TensorProto.FLOAT),
            helper.make_node("Mul", ["acc_f", "feature_scales"], ["unscaled"]),
            helper.make_node("Mul", ["unscaled", "scales"], ["logits"]),
            helper.make_node("Add", ["logits", "bias"], ["all"]),
            helper.make_node("TopK", ["all", "k"], ["approx", "candidates"], axis=-1),
        ],
        "older_int8",
        [v("features", TensorProto.UINT8, ["b", HIDDEN]), v("feature_scales", TensorProto.FLOAT, ["b", 1]), v("codes", TensorProto.INT8, [HIDDEN, "n"]),
         v("scales", TensorProto.FLOAT, ["n"]), v("bias", TensorProto.FLOAT, ["n"]), v("k", TensorProto.INT64, [1])],
        [v("candidates", TensorProto.INT64, ["b", "k"]), v("approx", TensorProto.FLOAT, ["b", "k"])],
        initializer=[numpy_helper.from_array(np.array(128, dtype=np.uint8), "zero")],
    )  # fmt: skip
    old_graph = tmp_path / "candidates_int8.onnx"
    old_graph.write_bytes(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)]).SerializeToString())
    t.candidate_graphs["int8"] = old_graph
    step = ReducedStep(t, "int8")
    exact = OnnxStep(a.step_graph)
    items, hidden = visit_states(exact, 16, seed=5)
    _, want, _ = exact.run(items, hidden, TOP)
    _, got, _ = step.run(items, hidden, TOP)
    assert np.mean([len(set(g) & set(w)) / TOP for g, w in zip(got, want)]) >= 0.99


def unpack_int4(packed: np.ndarray, scales: np.ndarray, dim: int) -> np.ndarray:
    """float32 [n, dim]: the dequantised vectors of a packed int4 table [n, blocks, 16] with its block scales [n, blocks]."""
    codes = np.empty((*packed.shape[:2], INT4_BLOCK), dtype=np.int16)
    codes[:, :, 0::2] = packed & 0x0F
    codes[:, :, 1::2] = packed >> 4
    return ((codes - 8) * scales[:, :, None]).reshape(len(packed), -1)[:, :dim].astype(np.float32)


def test_int4_scores_stay_within_the_quantisation_bound(artifact: Path) -> None:
    a = load_artifact(artifact)
    t = load_item_vectors(artifact, a.manifest, a.n_items)
    vectors = np.asarray(t.vectors)
    packed, scales = np.asarray(t.codes["int4"]), np.asarray(t.int4_scales)
    # The stored codes reproduce the vectors within half a step per coordinate, block by block.
    codes = np.stack([packed & 0x0F, packed >> 4], axis=-1)
    assert codes.min() >= 1 and codes.max() <= 15  # -7..7 + 8: symmetric
    v_hat = unpack_int4(packed, scales, HIDDEN)
    step = np.repeat(scales, INT4_BLOCK, axis=1)[:, :HIDDEN]
    assert np.all(np.abs(v_hat - vectors) <= step / 2 + 1e-6)
    # The candidate graph's scores of every item against the bound.
    reduced = ReducedStep(t, "int4")
    features = np.random.default_rng(0).normal(0, 1, (8, HIDDEN)).astype(np.float32)
    k = np.array([a.n_items], dtype=np.int64)
    cand, approx = reduced._candidates.run(None, {"features": features, "bias": t.bias, "k": k})
    exact = features.astype(np.float64) @ vectors.T.astype(np.float64) + t.bias  # [8, n]
    s_f = np.abs(features).max(axis=1, keepdims=True) / 127.0  # [8, 1]
    bound = np.abs(features) @ (step / 2).T + s_f / 2 * np.abs(v_hat).sum(1)[None, :] + 1e-4  # [8, n]
    err = np.abs(approx - np.take_along_axis(exact, cand, 1))
    bound = np.take_along_axis(bound, cand, 1)
    assert np.all(err <= bound), float((err - bound).max())
    assert err.max() > 0.1 * bound.max()  # an approximation that comes near its bound, not one that never does


def test_an_artifact_without_int4_files_serves_int8_for_auto(artifact: Path) -> None:
    # Exports made before the int4 table: the other reduced paths are still there.
    a = load_artifact(artifact)
    older = {**a.manifest, "files": {f: v for f, v in a.manifest["files"].items() if f not in PRECISION_FILES["int4"]}}
    t = load_item_vectors(artifact, older, a.n_items)
    assert sorted(t.codes) == ["fp16", "int8"] and t.int4_scales is None
    with pytest.raises(StepError, match="no 'int4' item vectors"):
        ReducedStep(t, "int4")
    assert scoring_path("auto", REDUCED_FROM, {"fp16", "int8"}) == "int8"
    assert scoring_path("int4", REDUCED_FROM, {"fp16", "int8"}) == "exact"


def test_an_export_holds_the_precisions_asked_for(tmp_path: Path) -> None:
    # The default: int8 alone (what auto serves); fp16 and int4 on request, each with all its files.
    default = write_random_artifact(tmp_path, "shop", "v1", n_items=300, hidden_size=8, seed=1)
    a = load_artifact(default)
    assert a.manifest["item_vectors"]["precisions"] == list(DEFAULT_PRECISIONS) == ["int8"]
    assert a.manifest["item_vectors"]["packed"] == ["int8"]
    held = {p.name for p in default.iterdir()}
    assert set(ITEM_VECTOR_FILES) | set(PRECISION_FILES["int8"]) <= held and not (set(PRECISION_FILES["fp16"]) | set(PRECISION_FILES["int4"])) & held
    t = load_item_vectors(default, a.manifest, a.n_items)
    assert sorted(t.codes) == ["int8"] and t.int4_scales is None
    assert load_model(default, 1, 8, "int4").scoring == "exact"  # not exported with it: served exactly (logged)
    assert load_model(default, 1, 8, "int8").scoring == "int8"
    some = write_random_artifact(tmp_path, "shop", "v2", n_items=300, hidden_size=8, seed=1, precisions=("int8", "fp16"))
    a = load_artifact(some)
    assert a.manifest["item_vectors"]["precisions"] == ["fp16", "int8"]  # in one order
    assert sorted(load_item_vectors(some, a.manifest, a.n_items).codes) == ["fp16", "int8"]
    with pytest.raises(ArtifactError, match="unknown precision 'int2'"):
        write_random_artifact(tmp_path, "shop", "v3", n_items=300, hidden_size=8, precisions=("int2",))


def test_from_the_reduced_size_on_the_default_export_holds_both_packed_tables_and_auto_serves_int4_int8(tmp_path: Path, monkeypatch) -> None:
    from service.artifacts import item_vectors
    from service.cli import main

    assert default_precisions(REDUCED_FROM - 1) == ("int8",) and default_precisions(REDUCED_FROM) == ("int8", "int4")
    # The rule at a test's size: `cairn export --random` with no --precisions, as a user runs it.
    monkeypatch.setattr(item_vectors, "REDUCED_FROM", 400)
    argv = ["export", "--random", "--items", "{n}", "--hidden-size", "8", "--artifacts", str(tmp_path), "--name", "shop", "--version", "v{n}"]
    for n, held in ((399, ["int8"]), (400, ["int8", "int4"])):
        assert main([a.format(n=n) for a in argv]) == 0
        a = load_artifact(tmp_path / "shop" / f"v{n}")
        assert a.manifest["item_vectors"]["precisions"] == a.manifest["item_vectors"]["packed"] == held
    monkeypatch.setattr("service.runtime.active.REDUCED_FROM", 400)
    model = load_model(tmp_path / "shop" / "v400", 1, 8, "auto")
    assert model.scoring in ("int4+int8", "int8")  # int8 alone where int4 won no batch size when timed at load


@pytest.mark.parametrize("precision", ["fp16", "int8", "int4"])
def test_top_20_agrees_with_exact_argpartition(artifact: Path, precision: str) -> None:
    a = load_artifact(artifact)
    t = load_item_vectors(artifact, a.manifest, a.n_items)
    exact_step, reduced = OnnxStep(a.step_graph), ReducedStep(t, precision)
    items, hidden = visit_states(exact_step, 64, seed=1)
    next_hidden, top_items, top_scores = reduced.run(items, hidden, TOP)
    ref_hidden, ref_items, _ = exact_step.run(items, hidden, TOP)
    np.testing.assert_allclose(next_hidden, ref_hidden, atol=1e-6)  # the same GRU step
    features = open_session(t.feature_graph).run(None, {"x": np.asarray(t.embedding[items]), "hidden": hidden})[1]
    truth = exact_top(features, np.asarray(t.vectors), t.bias, TOP)
    agreement = np.mean([len(set(r) & set(e)) / TOP for r, e in zip(top_items.tolist(), truth.tolist())])
    assert agreement >= 0.99, agreement  # random weights: the worst case (scores bunched together)
    # The exact step graph ranks as the reference does (the tables match the graph's).
    assert np.mean([len(set(r) & set(e)) / TOP for r, e in zip(ref_items.tolist(), truth.tolist())]) >= 0.999
    # Answers carry exact float32 scores, best first.
    want = np.einsum("bkd,bd->bk", np.asarray(t.vectors)[top_items], features) + t.bias[top_items]
    np.testing.assert_allclose(top_scores, want, atol=1e-5)
    assert np.all(np.diff(top_scores, axis=1) <= 0)


def test_int4_int8_ranks_few_rows_from_int4_and_more_from_int8(artifact: Path) -> None:
    a = load_artifact(artifact)
    t = load_item_vectors(artifact, a.manifest, a.n_items)
    exact_step, both = OnnxStep(a.step_graph), ReducedStep(t, "int8", small="int4", small_up_to=2)
    alone = {p: ReducedStep(t, p) for p in ("int4", "int8")}
    assert (both.scoring, both.small_up_to) == ("int4+int8", 2)
    for rows, table in ((1, "int4"), (2, "int4"), (3, "int8"), (8, "int8")):
        items, hidden = visit_states(exact_step, rows, seed=rows)
        _, top_items, top_scores = both.run(items, hidden, TOP)
        assert both.last_scoring == table
        _, want_items, want_scores = alone[table].run(items, hidden, TOP)  # what that table's own step answers
        np.testing.assert_array_equal(top_items, want_items)
        np.testing.assert_array_equal(top_scores, want_scores)
    # int4 kept for no size: its session is closed again, and the step is int8's.
    none = ReducedStep(t, "int8", small="int4", small_up_to=0)
    assert (none.scoring, none._small) == ("int8", None) and "int4:codes" not in none._tables
    none.run(*visit_states(exact_step, 1, seed=9), TOP)
    assert none.last_scoring == "int8"
    with pytest.raises(StepError, match="two packed precisions"):
        ReducedStep(t, "fp16", small="int4")  # fp16's table is fed, not packed
    with pytest.raises(StepError, match="two packed precisions"):
        ReducedStep(t, "int8", small="int8")


class _Costs:
    """Stands in for a candidate session: each call sleeps for `cost(rows)` seconds."""

    def __init__(self, cost) -> None:
        self.cost = cost

    def run(self, _outputs, feed: dict) -> None:
        time.sleep(self.cost(len(feed["features"])))


def test_the_small_batch_table_is_kept_for_the_sizes_it_ranks_faster(artifact: Path) -> None:
    a = load_artifact(artifact)
    step = ReducedStep(load_item_vectors(artifact, a.manifest, a.n_items), "int8")
    # 4 ms a row against a flat 10 ms: faster for 1 and 2 rows, slower from 3.
    assert step._rows_scored_faster(_Costs(lambda rows: 0.004 * rows), _Costs(lambda rows: 0.010)) == 2
    assert step._rows_scored_faster(_Costs(lambda rows: 0.006), _Costs(lambda rows: 0.002)) == 0
    assert step._rows_scored_faster(_Costs(lambda rows: 0.001), _Costs(lambda rows: 0.004)) == SMALL_BATCH_MAX


def test_reduced_step_refuses_bad_calls(artifact: Path) -> None:
    a = load_artifact(artifact)
    step = ReducedStep(load_item_vectors(artifact, a.manifest, a.n_items), "int8")
    hidden = step.zero_hidden(1)
    for items, top_n in [(np.array([N_ITEMS]), 5), (np.array([-1]), 5), (np.array([], dtype=np.int64), 5), (np.array([0]), 0)]:
        with pytest.raises(StepError):
            step.run(items, hidden, top_n)
    assert candidates_for(20, N_ITEMS) >= 4 * 20 and candidates_for(5, 100) == 100


def test_scoring_setting_picks_the_path_and_falls_back_to_exact(artifact: Path, tmp_path: Path) -> None:
    every = set(PRECISIONS)
    assert scoring_path("auto", REDUCED_FROM, {"fp16", "int8"}) == "int8"
    assert scoring_path("auto", REDUCED_FROM, {"int4"}) == "int4"
    # Both packed tables where the export wrote both; int4+int8 asked of an artifact with one of
    # them serves that one.
    assert scoring_path("auto", REDUCED_FROM, every) == "int4+int8" == scoring_path("int4+int8", 10, every)
    assert scoring_path("int4+int8", 10, {"int8"}) == "int8" and scoring_path("int4+int8", 10, {"fp16", "int4"}) == "int4"
    assert scoring_path("int4+int8", 10, every, packed={"int4"}) == "int4" and scoring_path("int4+int8", 10, {"fp16"}) == "exact"
    # An int8 table fed to its graph (exports before it was packed) comes after int4.
    assert scoring_path("auto", REDUCED_FROM, every, packed={"int4"}) == "int4"
    assert scoring_path("auto", REDUCED_FROM, {"fp16", "int8"}, packed={"int4"}) == "int8"
    assert scoring_path("auto", REDUCED_FROM, set()) == "exact"  # item vectors without a reduced copy
    assert scoring_path("auto", REDUCED_FROM - 1, every) == "exact"
    assert scoring_path("auto", 10**6, None) == "exact"
    assert scoring_path("fp16", 10, every) == "fp16" and scoring_path("int8", 10, None) == "exact" and scoring_path("fp16", 10, {"int4"}) == "exact"
    assert scoring_path("exact", 10**6, every) == "exact"
    for scoring in ("exact", "fp16", "int8", "int4"):
        model = load_model(artifact, 1, 8, scoring)
        assert model.scoring == scoring and model.gru.scoring == scoring
    # An artifact written without item vectors (an older export, its tables inside the graph):
    # every setting serves exactly.
    a = load_artifact(artifact)
    self_contained = onnx.load(str(a.step_graph)).SerializeToString()  # onnx.load reads the external tables in
    plain = write_artifact(
        tmp_path, "old", "v1", step_graph=self_contained, item_ids=a.item_ids, neighbour_items=a.neighbour_items,
        neighbour_scores=a.neighbour_scores, popularity=a.popularity, manifest_fields={"model": a.manifest["model"]},
    )
    assert not set(ITEM_VECTOR_FILES) & {p.name for p in plain.iterdir()}
    for scoring in ("auto", "int8", "fp16", "int4"):
        assert load_model(plain, 1, 8, scoring).scoring == "exact"


def test_fallback_recommenders_work_beside_a_reduced_model(artifact: Path) -> None:
    asyncio.run(_fallbacks(artifact))


async def _fallbacks(artifact: Path) -> None:
    model = load_model(artifact, 1, 8, "int8")
    model.start()
    try:
        state, ranking = await model.gru.step(model.gru.start(), 7, 10, frozenset({1, 2}))
        assert len(ranking.items) == 10 and ranking.scoring == "int8" and not {1, 2} & set(ranking.items)
        again = await model.gru.rank(state, 10, frozenset({1, 2}))
        assert again.items == ranking.items
        _, by_neighbours = await model.neighbours.step(model.neighbours.start(), 7, 10)
        assert len(by_neighbours.items) == 10 and 7 not in by_neighbours.items
        assert len(model.popularity.top(10).items) == 10
    finally:
        await model.close()


def test_int8_candidate_scores_are_exact_integer_products(artifact: Path) -> None:
    # Features that DynamicQuantizeLinear maps onto whole codes (ONNX operator specification):
    # a batch ranging over -128..127 has scale 1 and zero point 128, so the uint8 codes are 255
    # (f = 127) and 0 (f = -128), the extremes where a kernel adding pairs of products in
    # saturating int16 would go wrong against item codes of up to +-63. The reference is NumPy's
    # int64 product of the same codes, times each item's scale.
    a = load_artifact(artifact)
    t = load_item_vectors(artifact, a.manifest, a.n_items)
    assert np.abs(np.asarray(t.codes["int8"])).max() == 63  # the largest coordinate of every item
    features = np.full((2, HIDDEN), 127.0, dtype=np.float32)
    features[1] = -128.0
    feed = {"features": features, "bias": np.zeros(N_ITEMS, np.float32), "k": np.array([N_ITEMS], dtype=np.int64)}
    cand, approx = ReducedStep(t, "int8")._candidates.run(None, feed)
    want = (features.astype(np.int64) @ np.asarray(t.codes["int8"], dtype=np.int64)) * t.scales.astype(np.float64)  # [2, n]
    np.testing.assert_allclose(approx, np.take_along_axis(want, cand, 1), rtol=1e-6)


def test_exported_step_graph_keeps_the_tables_outside(artifact: Path) -> None:
    # The exact graph refers to embedding.npy and item_vectors.npy (ONNX external data) and runs
    # like a graph holding its tables itself (onnx.load reads the external data in).
    a = load_artifact(artifact)
    assert a.step_graph.stat().st_size < 100_000 < (artifact / "item_vectors.npy").stat().st_size
    proto = onnx.load(str(a.step_graph), load_external_data=False)
    external = {t.name: {e.key: e.value for e in t.external_data} for t in proto.graph.initializer if t.external_data}
    assert {k: v["location"] for k, v in external.items()} == {"embedding": "embedding.npy", "output": "item_vectors.npy"}
    inline = open_session_bytes(onnx.load(str(a.step_graph)).SerializeToString())
    outside = OnnxStep(a.step_graph)
    items, hidden = visit_states(outside, 4, seed=5)
    want = inline.run(None, {"items": items, "hidden": hidden, "top_n": np.array([TOP], dtype=np.int64)})
    got = outside.run(items, hidden, TOP)
    for w, g in zip(want[:3], got):
        np.testing.assert_array_equal(w, g)


def open_session_bytes(graph: bytes):
    import onnxruntime as ort

    return ort.InferenceSession(graph, providers=["CPUExecutionProvider"])
