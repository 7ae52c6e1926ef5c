"""The ONNX graphs of a trained GRU: the step graph, and the item-vector files and graphs of the
reduced-precision scoring paths.

The step graph is written node by node with `onnx.helper` from the model's weights rather than
traced with `torch.onnx.export`, whose output changes from one torch release to the next. One call
advances every session of the batch by one click and ranks all items:

    items [B] --Gather(E)--> x [B, E] --Unsqueeze--> [1, B, E]
    hidden [L, B, H] --Split--> h_l [1, B, H]
    GRU_l(x_l, h_l) -> h_l' [1, B, H]; x_{l+1} = h_l' (a sequence of one step)
    next_hidden = Concat(h_l') [L, B, H]
    f = Squeeze(h_L') [B, H] --(Gemm, Tanh)*--> [B, D]
    scores = Gemm(f, O [n_items, D], b, transB) [B, n_items] --TopK(top_n)--> top_items, top_scores

In an artifact, the two big tables (E and O) are not inside the protobuf: the graph refers to the
raw data of `embedding.npy` and `item_vectors.npy` (ONNX external data: file, offset past the .npy
header, length), so the export never builds or serialises a graph of hundreds of MB, and the
tables exist once on disk for both the exact graph and the reduced-precision path.

PyTorch's GRU and the ONNX GRU operator compute the same cell when the ONNX node has
`linear_before_reset=1` (the reset gate multiplies (R_h h + Rb_h), as in torch.nn.GRU's
n = tanh(W_in x + b_in + r * (W_hn h + b_hn))); only the order of the gate blocks differs:
torch stacks (r, z, n), ONNX stacks (z, r, h) (ONNX Operators.md, GRU; torch.nn.GRU docs).
"""

from __future__ import annotations

import io
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

from service.artifacts.format import RowBlocks
from service.artifacts.item_vectors import (
    CANDIDATE_GRAPH_FORMAT,
    CANDIDATES_FP16,
    CANDIDATES_INT4,
    CANDIDATES_INT8,
    DEFAULT_PRECISIONS,
    EMBEDDING,
    FEATURE_GRAPH,
    FEATURE_GRAPH_FORMAT,
    INT4_BLOCK,
    INT4_LEVELS,
    INT4_ZERO_POINT,
    INT8_LEVELS,
    ITEM_BIAS,
    ITEM_SCALES,
    ITEM_SCALES_INT4,
    ITEM_VECTORS,
    ITEM_VECTORS_FP16,
    ITEM_VECTORS_INT4,
    ITEM_VECTORS_INT8,
    PRECISION_FILES,
    int4_blocks,
)
from service.errors import ArtifactError
from offline.export.grouped_top_k import best_k_nodes, group_rows_for
from offline.model.gru import NextClickGRU

# Opset 17 and IR 8: everything the graph uses exists there, and ONNX Runtime releases back to
# 1.14 read it, so a serving image need not track the newest runtime.
OPSET = 17
IR_VERSION = 8
GRAPH_FORMAT = "cairn-gru-step/1"  # stored in the graph's metadata
_QUANTISE_SLICE = 65_536  # items quantised at a time
_TRANSPOSE_DIMS = 25  # rows of a transposed reduced copy made at a time


@dataclass
class _StepWeights:
    """What the graph needs, as float32 NumPy arrays in PyTorch's layout and gate order."""

    embedding: np.ndarray  # [n_items, E]
    gru: list[tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]]  # per layer: W_ih [3H, in], W_hh [3H, H], b_ih [3H], b_hh [3H]
    ff: list[tuple[np.ndarray, np.ndarray]]  # per layer: W [out, in], b [out]
    output: np.ndarray  # [n_items, D]
    output_bias: np.ndarray  # [n_items]

    @property
    def n_items(self) -> int:
        return self.embedding.shape[0]

    @property
    def hidden_size(self) -> int:
        return self.gru[0][1].shape[1]


def build_step_graph(model: NextClickGRU) -> bytes:
    """The serialized ONNX step graph of `model`, self-contained (see the module docstring)."""
    return graph_from_weights(weights_of(model)).SerializeToString()


def artifact_step_graph(model: NextClickGRU) -> bytes:
    """The step graph as an artifact holds it: its two item tables refer to EMBEDDING and ITEM_VECTORS."""
    return graph_from_weights(weights_of(model), external=True).SerializeToString()


def npy_data_offset(array: np.ndarray) -> int:
    """Where the raw data starts in the .npy file `np.save` writes for `array` (its header length:
    format 1.0, padded to a multiple of 64 bytes; the header records dtype, order and shape only)."""
    info = np.lib.format.header_data_from_array_1_0(np.ascontiguousarray(array[:0]))
    info["shape"] = array.shape
    buf = io.BytesIO()
    np.lib.format.write_array_header_1_0(buf, info)
    return buf.tell()


def _external(name: str, array: np.ndarray, location: str) -> onnx.TensorProto:
    """An initialiser whose data is the raw data of the .npy file `location` beside the graph."""
    t = onnx.TensorProto()
    t.name = name
    t.data_type = TensorProto.FLOAT
    t.dims.extend(array.shape)
    t.data_location = TensorProto.EXTERNAL
    for key, value in (("location", location), ("offset", str(npy_data_offset(array))), ("length", str(array.nbytes))):
        entry = t.external_data.add()
        entry.key, entry.value = key, value
    return t


def weights_of(model: NextClickGRU) -> _StepWeights:
    def arr(t: Any) -> np.ndarray:
        # No copy when the tensor is float32 already (the export only reads it): a million-item
        # model's two tables are 800 MB.
        return np.ascontiguousarray(t.detach().cpu().numpy(), dtype=np.float32)

    c = model.config
    gru = [
        (
            arr(getattr(model.gru, f"weight_ih_l{k}")),
            arr(getattr(model.gru, f"weight_hh_l{k}")),
            arr(getattr(model.gru, f"bias_ih_l{k}")),
            arr(getattr(model.gru, f"bias_hh_l{k}")),
        )
        for k in range(c.layers)
    ]
    ff = [(arr(layer.weight), arr(layer.bias)) for layer in model.ff]
    return _StepWeights(
        embedding=arr(model.embedding.weight),
        gru=gru,
        ff=ff,
        output=arr(model.output_weight),
        output_bias=arr(model.output_bias.weight).reshape(-1),
    )


def _torch_gates_to_onnx(w: np.ndarray) -> np.ndarray:
    """Reorder stacked gate blocks along axis 0 from torch's (r, z, n) to ONNX's (z, r, h)."""
    r, z, n = np.split(w, 3, axis=0)
    return np.concatenate([z, r, n], axis=0)


def _recurrent_part(w: _StepWeights, const: Any, nodes: list[onnx.NodeProto], x: str) -> str:
    """GRU layers and feed-forward layers from `x` [1, B, E]; adds `next_hidden` and returns the
    name of the feature vector f [B, D]. Shared by the step graph and the feature graph."""
    n_layers, hidden = len(w.gru), w.hidden_size
    axis0 = const("axis0", np.array([0], dtype=np.int64))
    if n_layers == 1:
        h_in = ["hidden"]
    else:
        # Without a `split` input, Split cuts axis 0 into as many equal parts as it has outputs.
        h_in = [f"h_in{k}" for k in range(n_layers)]
        nodes.append(helper.make_node("Split", ["hidden"], h_in, axis=0))  # L x [1, B, H]

    h_out = []
    for k, (w_ih, w_hh, b_ih, b_hh) in enumerate(w.gru):
        W = const(f"gru{k}_W", _torch_gates_to_onnx(w_ih)[None])  # [1, 3H, in]
        R = const(f"gru{k}_R", _torch_gates_to_onnx(w_hh)[None])  # [1, 3H, H]
        B = const(f"gru{k}_B", np.concatenate([_torch_gates_to_onnx(b_ih), _torch_gates_to_onnx(b_hh)])[None])  # [1, 6H]
        y_h = f"h_out{k}"
        # Outputs: Y (all steps) is not needed; Y_h [1, B, H] is the new state and, being a
        # sequence of one step, also the next layer's input.
        nodes.append(
            helper.make_node("GRU", [x, W, R, B, "", h_in[k]], ["", y_h], hidden_size=hidden, linear_before_reset=1, name=f"gru{k}")
        )
        h_out.append(y_h)
        x = y_h

    if n_layers == 1:
        nodes.append(helper.make_node("Identity", h_out, ["next_hidden"]))
    else:
        nodes.append(helper.make_node("Concat", h_out, ["next_hidden"], axis=0))  # [L, B, H]

    nodes.append(helper.make_node("Squeeze", [h_out[-1], axis0], ["f0"]))  # [B, H]
    f = "f0"
    for k, (weight, bias) in enumerate(w.ff):
        g = f"ff{k}_linear"
        nodes.append(helper.make_node("Gemm", [f, const(f"ff{k}_W", weight), const(f"ff{k}_b", bias)], [g], transB=1))  # [B, out]
        nodes.append(helper.make_node("Tanh", [g], [f"f{k + 1}"]))
        f = f"f{k + 1}"
    return f


def _initialiser_list() -> tuple[list[onnx.TensorProto], Any]:
    inits: list[onnx.TensorProto] = []

    def const(name: str, value: np.ndarray) -> str:
        if not any(t.name == name for t in inits):
            inits.append(numpy_helper.from_array(np.ascontiguousarray(value), name))
        return name

    return inits, const


def _finish(graph: onnx.GraphProto, kind: str, check: bool = True, domains: tuple[str, ...] = ()) -> onnx.ModelProto:
    opsets = [helper.make_opsetid("", OPSET), *(helper.make_opsetid(d, 1) for d in domains)]
    model = helper.make_model(graph, producer_name="cairn", opset_imports=opsets)
    model.ir_version = IR_VERSION
    helper.set_model_props(model, {"cairn.graph": kind})
    if not check:
        return model
    try:
        onnx.checker.check_model(model, full_check=True)
    except (onnx.checker.ValidationError, onnx.shape_inference.InferenceError) as exc:
        raise ArtifactError(f"the {kind} graph does not pass the ONNX checker: {exc}") from exc
    return model


def graph_from_weights(w: _StepWeights, external: bool = False) -> onnx.ModelProto:
    """The step graph; `external`: its embedding and output tables refer to the artifact's
    EMBEDDING and ITEM_VECTORS files instead of being inside it."""
    n_items, hidden, n_layers = w.n_items, w.hidden_size, len(w.gru)
    inits, const = _initialiser_list()
    nodes: list[onnx.NodeProto] = []
    axis0 = const("axis0", np.array([0], dtype=np.int64))
    big = {"embedding": (w.embedding, EMBEDDING), "output": (w.output, ITEM_VECTORS)}
    if external:
        # Checked first with the two tables as graph inputs of the same type and shape: the checker
        # would otherwise want the files, which do not exist yet.
        _check_structure(w)
        inits.extend(_external(name, a, location) for name, (a, location) in big.items())
    else:
        for name, (a, _) in big.items():
            const(name, a)
    nodes.append(helper.make_node("Gather", ["embedding", "items"], ["x"], axis=0))  # [B, E]
    nodes.append(helper.make_node("Unsqueeze", ["x", axis0], ["x_seq0"]))  # [1, B, E]
    f = _recurrent_part(w, const, nodes, "x_seq0")

    # O [n_items, D], the layout of item_vectors.npy; ONNX Runtime packs it for its kernel at load.
    # It is the one big read per call.
    nodes.append(helper.make_node("Gemm", [f, "output", const("output_bias", w.output_bias)], ["scores"], transB=1))  # [B, n_items]
    nodes.append(helper.make_node("TopK", ["scores", "top_n"], ["top_scores", "top_items"], axis=-1, largest=1, sorted=1))

    graph = helper.make_graph(
        nodes,
        "cairn_gru_step",
        inputs=[
            helper.make_tensor_value_info("items", TensorProto.INT64, ["batch"]),
            helper.make_tensor_value_info("hidden", TensorProto.FLOAT, [n_layers, "batch", hidden]),
            helper.make_tensor_value_info("top_n", TensorProto.INT64, [1]),
        ],
        outputs=[
            helper.make_tensor_value_info("next_hidden", TensorProto.FLOAT, [n_layers, "batch", hidden]),
            helper.make_tensor_value_info("top_items", TensorProto.INT64, ["batch", "top_n"]),
            helper.make_tensor_value_info("top_scores", TensorProto.FLOAT, ["batch", "top_n"]),
            helper.make_tensor_value_info("scores", TensorProto.FLOAT, ["batch", n_items]),
        ],
        initializer=inits,
    )
    return _finish(graph, GRAPH_FORMAT, check=not external)


def _check_structure(w: _StepWeights) -> None:
    """The ONNX checker over the step graph with its big tables as inputs (see graph_from_weights)."""
    small = graph_from_weights(_StepWeights(w.embedding[:0], w.gru, w.ff, w.output[:0], w.output_bias[:0]))
    del small  # built and checked: a graph of 0 items has every node, type and attribute of the real one


def build_feature_graph(w: _StepWeights) -> bytes:
    """The step without the item tables (see service/artifacts/item_vectors.py): the caller gathers
    x = embedding[items] itself and scores the features f against the item vectors."""
    hidden, n_layers = w.hidden_size, len(w.gru)
    inits, const = _initialiser_list()
    nodes: list[onnx.NodeProto] = [helper.make_node("Unsqueeze", ["x", const("axis0", np.array([0], dtype=np.int64))], ["x_seq0"])]
    f = _recurrent_part(w, const, nodes, "x_seq0")
    nodes.append(helper.make_node("Identity", [f], ["features"]))
    graph = helper.make_graph(
        nodes,
        "cairn_gru_features",
        inputs=[
            helper.make_tensor_value_info("x", TensorProto.FLOAT, ["batch", w.embedding.shape[1]]),
            helper.make_tensor_value_info("hidden", TensorProto.FLOAT, [n_layers, "batch", hidden]),
        ],
        outputs=[
            helper.make_tensor_value_info("next_hidden", TensorProto.FLOAT, [n_layers, "batch", hidden]),
            helper.make_tensor_value_info("features", TensorProto.FLOAT, ["batch", w.output.shape[1]]),
        ],
        initializer=inits,
    )
    return _finish(graph, FEATURE_GRAPH_FORMAT).SerializeToString()


def build_candidate_graph(precision: str, dim: int, n_items: int) -> bytes:
    """Approximate scores of every item from reduced-precision item vectors, and the best `k`.

    inputs   features float32 [B, D]; bias float32 [n_items]; k int64 [1]
             fp16 only: codes float16 [D, n_items]
    outputs  candidates int64 [B, k], approx float32 [B, k] (descending)

    The best k come from grouped_top_k.best_k_nodes (two exact levels from GROUPED_FROM items on).

    fp16: the table is an input, not an initialiser: the service feeds its read-only memory map
    of the artifact's array, so every worker reads the same pages.

    int8: DynamicQuantizeMatMul (com.microsoft domain): the features are quantised to uint8 per
    call (asymmetric, one scale for the batch), multiplied with the int8 item codes [D, n_items] in
    integers and scaled per item (`scales` [n_items]), the bias added in the same operator. The
    table is an initialiser, as for int4 (see build_int4_candidate_graph): the graph holds one-item
    placeholders named `codes` and `scales` that the service replaces with the memory-mapped
    arrays, and ONNX Runtime packs its own copy for its integer GEMM (about 100 bytes an item at
    D = 100: a private 100 MB per worker at a million items). Packed, a batch of 8 rows costs about
    1.3x one row (one row 1.5 ms, 8 rows 2.1 ms at 200,000 items here), where MatMulNBits' int4
    costs 7x. Why item codes of 7 bits (-63..63, see _codes): ONNX Runtime's uint8 x int8 kernel
    on AVX2 without VNNI adds pairs of products in saturating int16 (vpmaddubsw); 255 * 63 * 2 <
    32767 keeps every pair exact (ONNX Runtime's quantisation tool offers the same
    "reduce_range" for this). Artifacts exported before int8 was packed hold a MatMulInteger graph
    that takes the table as an input (the manifest's `item_vectors.packed` tells them apart).
    """
    nodes: list[onnx.NodeProto] = []
    inputs = [helper.make_tensor_value_info("features", TensorProto.FLOAT, ["batch", dim])]
    inits: list[onnx.TensorProto] = []
    if precision == "int8":
        inits += [
            numpy_helper.from_array(np.zeros((dim, 1), dtype=np.int8), "codes"),
            numpy_helper.from_array(np.ones(1, dtype=np.float32), "scales"),
        ]
        nodes.append(helper.make_node("DynamicQuantizeMatMul", ["features", "codes", "scales", "", "bias"], ["approx_all"], domain="com.microsoft"))
    elif precision == "fp16":
        inputs.append(helper.make_tensor_value_info("codes", TensorProto.FLOAT16, [dim, "n_items"]))
        nodes += [
            helper.make_node("Cast", ["features"], ["f16"], to=TensorProto.FLOAT16),
            helper.make_node("MatMul", ["f16", "codes"], ["logits16"]),
            helper.make_node("Cast", ["logits16"], ["logits"], to=TensorProto.FLOAT),
            helper.make_node("Add", ["logits", "bias"], ["approx_all"]),
        ]
    else:
        raise ArtifactError(f"no candidate graph for precision {precision!r}")
    inputs += [
        helper.make_tensor_value_info("bias", TensorProto.FLOAT, ["n_items"]),
        helper.make_tensor_value_info("k", TensorProto.INT64, [1]),
    ]
    best, consts = best_k_nodes("approx_all", "k", n_items, group_rows_for(n_items), "approx", "candidates")
    nodes += best
    inits += consts
    graph = helper.make_graph(
        nodes,
        f"cairn_candidates_{precision}",
        inputs=inputs,
        outputs=[
            helper.make_tensor_value_info("candidates", TensorProto.INT64, ["batch", "k"]),
            helper.make_tensor_value_info("approx", TensorProto.FLOAT, ["batch", "k"]),
        ],
        initializer=inits,
    )
    # The ONNX checker knows no com.microsoft operators; ONNX Runtime checks the graph when it opens it.
    model = _finish(graph, f"{CANDIDATE_GRAPH_FORMAT}-{precision}", check=precision != "int8", domains=("com.microsoft",) if precision == "int8" else ())
    return model.SerializeToString()


def build_int4_candidate_graph(dim: int, n_items: int) -> bytes:
    """Approximate scores of every item from the int4 table (item_vectors_int4.npy), and the best `k`.

    inputs   features float32 [B, D]; bias float32 [n_items]; k int64 [1]
    outputs  candidates int64 [B, k], approx float32 [B, k] (descending)

    ONNX Runtime's MatMulNBits (com.microsoft domain; 4 bits, blocks of INT4_BLOCK, no zero points
    given: 8) computes features . dequantised vectors. Its tables are initialisers, because its fast
    kernels need them packed at load; the graph holds two one-item placeholders named `codes` and
    `scales`, which the service replaces with the artifact's memory-mapped arrays
    (`SessionOptions.add_initializer`), so the file stays small and the table exists once on disk.
    ONNX Runtime then packs its own copy (about 80 bytes an item with the scales at D = 100: a
    private 80 MB per worker at a million items). accuracy_level 4 quantises each block of the features to int8 and multiplies in
    integers: on this machine (AVX2) 5-8x faster than the float path, and the exact re-scoring of
    the candidates takes out the extra error.
    """
    blocks = int4_blocks(dim)
    inits = [
        numpy_helper.from_array(np.full((1, blocks, INT4_BLOCK // 2), INT4_ZERO_POINT * 17, dtype=np.uint8), "codes"),  # code 0 in both halves
        numpy_helper.from_array(np.ones(blocks, dtype=np.float32), "scales"),
    ]
    nodes = [
        helper.make_node("MatMulNBits", ["features", "codes", "scales"], ["logits"], domain="com.microsoft",
                         K=dim, N=n_items, bits=4, block_size=INT4_BLOCK, accuracy_level=4),  # fmt: skip
        helper.make_node("Add", ["logits", "bias"], ["approx_all"]),
    ]
    best, consts = best_k_nodes("approx_all", "k", n_items, group_rows_for(n_items), "approx", "candidates")
    nodes += best
    inits += consts
    graph = helper.make_graph(
        nodes,
        "cairn_candidates_int4",
        inputs=[
            helper.make_tensor_value_info("features", TensorProto.FLOAT, ["batch", dim]),
            helper.make_tensor_value_info("bias", TensorProto.FLOAT, [n_items]),
            helper.make_tensor_value_info("k", TensorProto.INT64, [1]),
        ],
        outputs=[
            helper.make_tensor_value_info("candidates", TensorProto.INT64, ["batch", "k"]),
            helper.make_tensor_value_info("approx", TensorProto.FLOAT, ["batch", "k"]),
        ],
        initializer=inits,
    )
    # The ONNX checker knows no com.microsoft operators; ONNX Runtime checks the graph when it opens it.
    return _finish(graph, f"{CANDIDATE_GRAPH_FORMAT}-int4", check=False, domains=("com.microsoft",)).SerializeToString()


def int4_scales(vectors: np.ndarray) -> np.ndarray:
    """float32 [n, blocks]: max |v| of each block of INT4_BLOCK coordinates / INT4_LEVELS (1 for an all-zero block)."""
    n, dim = vectors.shape
    starts = np.arange(0, dim, INT4_BLOCK)
    scales = np.empty((n, len(starts)), dtype=np.float32)
    for lo in range(0, n, _QUANTISE_SLICE):
        scales[lo : lo + _QUANTISE_SLICE] = np.maximum.reduceat(np.abs(vectors[lo : lo + _QUANTISE_SLICE]), starts, axis=1) / INT4_LEVELS
    scales[scales == 0] = 1.0
    return scales


def int4_codes(v: np.ndarray, s: np.ndarray) -> np.ndarray:
    """Packed int4 codes of float32 rows v [m, D] with their block scales s [m, blocks]: uint8
    [m, blocks, INT4_BLOCK / 2]. code = round(v / scale) in -7..7 (symmetric per block, common
    practice), so |v - scale code| <= scale / 2; stored code + 8, two a byte, the even coordinate
    in the low four bits (MatMulNBits' layout); padding coordinates are code 0."""
    m, dim = v.shape
    blocks = s.shape[1]
    padded = np.zeros((m, blocks * INT4_BLOCK), dtype=np.float32)
    padded[:, :dim] = v
    codes = np.clip(np.rint(padded.reshape(m, blocks, INT4_BLOCK) / s[:, :, None]), -INT4_LEVELS, INT4_LEVELS).astype(np.int8)
    codes = (codes + INT4_ZERO_POINT).view(np.uint8)  # 1..15
    return codes[:, :, 0::2] | (codes[:, :, 1::2] << 4)


def _int4_rows(vectors: np.ndarray, scales: np.ndarray) -> Iterator[np.ndarray]:
    """The int4 table in blocks of _QUANTISE_SLICE items, for RowBlocks."""
    for lo in range(0, len(vectors), _QUANTISE_SLICE):
        yield int4_codes(vectors[lo : lo + _QUANTISE_SLICE], scales[lo : lo + _QUANTISE_SLICE])


def int8_scales(vectors: np.ndarray) -> np.ndarray:
    """float32 [n]: scale_j = max_d |v_jd| / INT8_LEVELS (1 for an all-zero vector); see _codes."""
    scales = np.empty(len(vectors), dtype=np.float32)
    for lo in range(0, len(vectors), _QUANTISE_SLICE):
        s = np.abs(vectors[lo : lo + _QUANTISE_SLICE]).max(axis=1) / INT8_LEVELS
        s[s == 0] = 1.0
        scales[lo : lo + _QUANTISE_SLICE] = s
    return scales


def _codes(v: np.ndarray, s: np.ndarray) -> np.ndarray:
    """int8 codes (still as floats) of float32 rows v [m, D] with their scales s [m]: symmetric per
    item (common practice) on 7 bits (see build_candidate_graph for why), code = round(v / scale) in
    -63..63, so |v_jd - scale_j code_jd| <= scale_j / 2; an all-zero vector has scale 1 and codes 0."""
    return np.clip(np.rint(v / s[:, None]), -INT8_LEVELS, INT8_LEVELS)


def _transposed_blocks(vectors: np.ndarray, dtype: type, convert: Any, dims: int = _TRANSPOSE_DIMS) -> Iterator[np.ndarray]:
    """Rows of the [D, n] table `convert(vectors[lo:hi], lo)` transposed to `dtype`, `dims` rows (one
    block, 50 MB of fp16 at a million items) at a time, so the export writes a reduced copy without
    holding it whole. Each block is filled a slice of 8,192 items at a time: a whole-table transpose
    walks memory across rows (1.6 s at a million items; these blocks 0.5 s)."""
    step = 8192
    for a in range(0, vectors.shape[1], dims):
        block = np.empty((min(dims, vectors.shape[1] - a), len(vectors)), dtype=dtype)
        for lo in range(0, len(vectors), step):
            block[:, lo : lo + step] = convert(vectors[lo : lo + step, a : a + dims], lo).astype(dtype).T
        yield block


def item_vector_files(w: _StepWeights, precisions: tuple[str, ...] = DEFAULT_PRECISIONS) -> dict[str, Any]:
    """The optional artifact files of reduced-precision scoring (service/artifacts/item_vectors.py):
    the feature step and the float32 tables, and the reduced copies of `precisions`."""
    unknown = sorted(set(precisions) - set(PRECISION_FILES))
    if unknown:
        raise ArtifactError(f"unknown precision {unknown[0]!r}; expected some of {', '.join(PRECISION_FILES)}")
    dim = w.output.shape[1]
    files: dict[str, Any] = {FEATURE_GRAPH: build_feature_graph(w), EMBEDDING: w.embedding, ITEM_VECTORS: w.output, ITEM_BIAS: w.output_bias}
    # The reduced copies are written block by block: none exists whole in the export.
    if "fp16" in precisions:
        files[ITEM_VECTORS_FP16] = RowBlocks((dim, w.n_items), np.dtype(np.float16), lambda: _transposed_blocks(w.output, np.float16, lambda v, lo: v))
        files[CANDIDATES_FP16] = build_candidate_graph("fp16", dim, w.n_items)
    if "int8" in precisions:
        scales = int8_scales(w.output)
        files[ITEM_VECTORS_INT8] = RowBlocks(
            (dim, w.n_items), np.dtype(np.int8), lambda: _transposed_blocks(w.output, np.int8, lambda v, lo: _codes(v, scales[lo : lo + len(v)]))
        )
        files[ITEM_SCALES] = scales
        files[CANDIDATES_INT8] = build_candidate_graph("int8", dim, w.n_items)
    if "int4" in precisions:
        scales4 = int4_scales(w.output)
        files[ITEM_VECTORS_INT4] = RowBlocks((w.n_items, int4_blocks(dim), INT4_BLOCK // 2), np.dtype(np.uint8), lambda: _int4_rows(w.output, scales4))
        files[ITEM_SCALES_INT4] = scales4
        files[CANDIDATES_INT4] = build_int4_candidate_graph(dim, w.n_items)
    return files
