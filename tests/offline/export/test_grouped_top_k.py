"""The two-level best-k nodes against NumPy's sort, and inside an exported candidate graph.

Reference: `numpy.argsort` (stable, descending by negation) over the same float32 scores: the
best k items of each row are the first k of that order. Scores are drawn from a continuous
distribution, so ties (where any two TopKs may pick differently) do not occur.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from onnx import TensorProto, helper

from offline.export.artifact_writer import write_random_artifact
from offline.export.grouped_top_k import GROUP_ROWS, GROUPED_FROM, best_k_nodes, group_rows_for
from offline.export.onnx_graph import IR_VERSION, OPSET
from service.artifacts.format import load_artifact
from service.artifacts.item_vectors import load_item_vectors
from service.runtime.reduced_step import ReducedStep


def best_k_session(n_items: int, group_rows: int) -> ort.InferenceSession:
    nodes, consts = best_k_nodes("scores", "k", n_items, group_rows, "values", "indices")
    graph = helper.make_graph(
        nodes,
        "best_k",
        inputs=[helper.make_tensor_value_info("scores", TensorProto.FLOAT, ["batch", n_items]), helper.make_tensor_value_info("k", TensorProto.INT64, [1])],
        outputs=[helper.make_tensor_value_info("values", TensorProto.FLOAT, ["batch", "k"]), helper.make_tensor_value_info("indices", TensorProto.INT64, ["batch", "k"])],
        initializer=consts,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)])
    model.ir_version = IR_VERSION
    onnx.checker.check_model(model, full_check=True)  # the ONNX specification's checker, with shape inference
    return ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])


@pytest.mark.parametrize(
    ("n_items", "group_rows", "k"),
    [
        (1600, 16, 20),  # G divides n: no tail
        (1613, 16, 20),  # a tail of 13 items that belong to no column
        (1613, 16, 150),  # k above the 100 columns: every column is kept
        (1613, 16, 1613),  # every item
        (1613, 1, 20),  # one plain TopK
        (50, 16, 7),  # three columns and a tail of two
    ],
)
def test_best_k_is_numpy_sorts_first_k(n_items: int, group_rows: int, k: int) -> None:
    rng = np.random.default_rng(n_items + k)
    scores = rng.standard_normal((5, n_items)).astype(np.float32)
    scores[1, -3:] += 10.0  # the best items of a row in the tail
    scores[2, :group_rows] += 10.0  # ... in one column's first row
    scores[3, ::97] += 10.0  # ... spread over columns and rows
    values, indices = best_k_session(n_items, group_rows).run(None, {"scores": scores, "k": np.array([k], dtype=np.int64)})
    want = np.argsort(-scores, axis=1, kind="stable")[:, :k]
    np.testing.assert_array_equal(indices, want)
    np.testing.assert_array_equal(values, np.take_along_axis(scores, want, 1))


def test_catalogues_from_grouped_from_items_get_two_levels() -> None:
    assert group_rows_for(GROUPED_FROM - 1) == 1
    assert group_rows_for(GROUPED_FROM) == GROUP_ROWS == 16


def test_an_exported_candidate_graph_of_a_large_catalogue_ranks_exactly(tmp_path: Path) -> None:
    # 70,001 items: above GROUPED_FROM, with a tail of one item after 16 x 4,375.
    n = GROUPED_FROM + 4465
    path = write_random_artifact(tmp_path, "wide", "v1", n_items=n, hidden_size=8, seed=5, precisions=("fp16", "int8", "int4"))
    a = load_artifact(path)
    t = load_item_vectors(path, a.manifest, a.n_items)
    features = np.random.default_rng(1).standard_normal((8, 8)).astype(np.float32)
    k = np.array([128], dtype=np.int64)
    for precision in ("fp16", "int8", "int4"):
        graph = onnx.load(str(t.candidate_graphs[precision]))
        assert "ReduceMax" in {node.op_type for node in graph.graph.node}, precision
        step = ReducedStep(t, precision)
        feed = {**step._query(features), "k": k, **step._feed}
        candidates, approx = step._candidates.run(None, feed)
        # The same graph asked for every item keeps every column: its order is one TopK over all
        # the approximate scores, the reference for the first 128.
        all_items, all_approx = step._candidates.run(None, {**feed, "k": np.array([n], dtype=np.int64)})
        np.testing.assert_array_equal(np.sort(all_items, 1), np.broadcast_to(np.arange(n), (8, n)))
        np.testing.assert_array_equal(approx, all_approx[:, :128])
        np.testing.assert_array_equal(np.sort(candidates, 1), np.sort(all_items[:, :128], 1))
        assert np.all(np.diff(approx, axis=1) <= 0)
        step.close()
