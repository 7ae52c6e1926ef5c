"""ONNX nodes for the best k of a wide score row, in two levels, exactly.

ONNX Runtime's TopK over a batch of 8 rows of a million scores takes about 7 ms of one core
(measured on an AMD EPYC of this project's CI kind), a third of a shared candidate pass. Most of
that is one comparison per score. Two levels cut it to a quarter:

    scores [B, n] -> body [B, G, M] (item c + g M is row g, column c: M = n // G columns)
    group max [B, M] = ReduceMax over the G rows   (an elementwise max of G contiguous rows: vectorised)
    the best min(k, M) columns by group max        (TopK over n / G values)
    their G scores each, and the tail n - G M      (GatherElements: G min(k, M) + tail values)
    the best k of those                            (TopK, sorted) -> scores [B, k], items [B, k]

Why it is exact: if item x is among the best k, every column whose max beats x's column max holds
an item scoring above x; there are at most k - 1 such items, so x's column is among the best k
columns (ties aside, as in any TopK). Columns are strided (c, c + M, ...) rather than contiguous
blocks because ONNX Runtime reduces over a middle axis several times faster than over the last
one. Below GROUPED_FROM items, or when G M would leave nothing to skip, one plain TopK.
"""

from __future__ import annotations

import numpy as np
import onnx
from onnx import helper, numpy_helper

GROUP_ROWS = 16  # G: the first level reads n scores, the second 16 k
GROUPED_FROM = 65_536  # items; below it a plain TopK costs well under a millisecond


def group_rows_for(n_items: int) -> int:
    """G for a catalogue of `n_items` (1: one plain TopK)."""
    return GROUP_ROWS if n_items >= GROUPED_FROM else 1


def best_k_nodes(scores: str, k: str, n_items: int, group_rows: int, values: str, indices: str, prefix: str = "best_k") -> tuple[list[onnx.NodeProto], list[onnx.TensorProto]]:
    """Nodes (and their constants) that write the best `k` (an int64 [1] input) of `scores` [B,
    n_items] to `values` float32 [B, k] (descending) and `indices` int64 [B, k]; two levels when
    `group_rows` > 1. Names of intermediate values start with `prefix`."""
    if group_rows <= 1:
        return [helper.make_node("TopK", [scores, k], [values, indices], axis=-1, largest=1, sorted=1)], []
    g, m = group_rows, n_items // group_rows
    body, tail = g * m, n_items - g * m
    p = prefix
    consts = {
        f"{p}_axis1": np.array([1], dtype=np.int64),
        f"{p}_shape": np.array([-1, g, m], dtype=np.int64),
        f"{p}_columns": np.array([m], dtype=np.int64),
        f"{p}_rows": np.array([1, g, 1], dtype=np.int64),
        f"{p}_row_starts": (np.arange(g, dtype=np.int64) * m).reshape(1, g, 1),
        f"{p}_flat": np.array([0, -1], dtype=np.int64),
    }
    # Slice copies: skipped where G divides n (a million items, 200,000).
    nodes = [helper.make_node("Slice", [scores, f"{p}_zero", f"{p}_body_end", f"{p}_axis1"], [f"{p}_body"])] if tail else []
    nodes += [
        helper.make_node("Reshape", [f"{p}_body" if tail else scores, f"{p}_shape"], [f"{p}_grid"]),  # [B, G, M]
        helper.make_node("ReduceMax", [f"{p}_grid"], [f"{p}_column_max"], axes=[1], keepdims=0),  # [B, M]
        helper.make_node("Min", [k, f"{p}_columns"], [f"{p}_k_columns"]),
        helper.make_node("TopK", [f"{p}_column_max", f"{p}_k_columns"], [f"{p}_unused", f"{p}_best_columns"], axis=-1, largest=1, sorted=0),
        helper.make_node("Unsqueeze", [f"{p}_best_columns", f"{p}_axis1"], [f"{p}_columns_1"]),  # [B, 1, kc]
        helper.make_node("Expand", [f"{p}_columns_1", f"{p}_rows"], [f"{p}_picked"]),  # [B, G, kc]
        helper.make_node("GatherElements", [f"{p}_grid", f"{p}_picked"], [f"{p}_picked_scores_3"], axis=2),
        helper.make_node("Add", [f"{p}_picked", f"{p}_row_starts"], [f"{p}_picked_items_3"]),  # column c of row g is item c + g M
        helper.make_node("Reshape", [f"{p}_picked_scores_3", f"{p}_flat"], [f"{p}_picked_scores"]),  # [B, G kc]
        helper.make_node("Reshape", [f"{p}_picked_items_3", f"{p}_flat"], [f"{p}_picked_items"]),
    ]
    pool_scores, pool_items = f"{p}_picked_scores", f"{p}_picked_items"
    if tail:
        # The last n - G M items belong to no column: every one of them is a candidate.
        consts[f"{p}_zero"] = np.array([0], dtype=np.int64)
        consts[f"{p}_body_end"] = np.array([body], dtype=np.int64)
        consts[f"{p}_end"] = np.array([n_items], dtype=np.int64)
        consts[f"{p}_tail_items"] = np.arange(body, n_items, dtype=np.int64).reshape(1, tail)
        nodes += [
            helper.make_node("Slice", [scores, f"{p}_body_end", f"{p}_end", f"{p}_axis1"], [f"{p}_tail"]),  # [B, tail]
            helper.make_node("Shape", [f"{p}_tail"], [f"{p}_tail_shape"]),
            helper.make_node("Expand", [f"{p}_tail_items", f"{p}_tail_shape"], [f"{p}_tail_items_b"]),
            helper.make_node("Concat", [pool_scores, f"{p}_tail"], [f"{p}_pool_scores"], axis=1),
            helper.make_node("Concat", [pool_items, f"{p}_tail_items_b"], [f"{p}_pool_items"], axis=1),
        ]
        pool_scores, pool_items = f"{p}_pool_scores", f"{p}_pool_items"
    nodes += [
        helper.make_node("TopK", [pool_scores, k], [values, f"{p}_positions"], axis=-1, largest=1, sorted=1),
        helper.make_node("GatherElements", [pool_items, f"{p}_positions"], [indices], axis=1),
    ]
    return nodes, [numpy_helper.from_array(v, name) for name, v in consts.items()]
