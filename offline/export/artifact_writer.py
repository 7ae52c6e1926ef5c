"""Export a trained GRU as a model artifact: the ONNX step graph plus the fallback tables.

The step graph is written node by node with `onnx.helper` from the model's weights rather than
traced with `torch.onnx.export`, whose output changes from one torch release to the next. One call
advances every session of the batch by one click and ranks all items:

    items [B] --Gather(E)--> x [B, E] --Unsqueeze--> [1, B, E]
    hidden [L, B, H] --Split--> h_l [1, B, H]
    GRU_l(x_l, h_l) -> h_l' [1, B, H]; x_{l+1} = h_l' (a sequence of one step)
    next_hidden = Concat(h_l') [L, B, H]
    f = Squeeze(h_L') [B, H] --(Gemm, Tanh)*--> [B, D]
    scores = MatMul(f, O^T [D, n_items]) + b [B, n_items] --TopK(top_n)--> top_items, top_scores

PyTorch's GRU and the ONNX GRU operator compute the same cell when the ONNX node has
`linear_before_reset=1` (the reset gate multiplies (R_h h + Rb_h), as in torch.nn.GRU's
n = tanh(W_in x + b_in + r * (W_hn h + b_hn))); only the order of the gate blocks differs:
torch stacks (r, z, n), ONNX stacks (z, r, h) (ONNX Operators.md, GRU; torch.nn.GRU docs).
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

from service.artifacts.format import write_artifact
from service.errors import ArtifactError, InputDataError
from offline.data.dataset import PreparedData
from offline.model.gru import GRUConfig, NextClickGRU, load_checkpoint

# Opset 17 and IR 8: everything the graph uses exists there, and ONNX Runtime releases back to
# 1.14 read it, so a serving image need not track the newest runtime.
OPSET = 17
IR_VERSION = 8
GRAPH_FORMAT = "cairn-gru-step/1"  # stored in the graph's metadata


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
    """The serialized ONNX step graph of `model` (see the module docstring and service/artifacts.py)."""
    return _graph_from_weights(_weights_of(model)).SerializeToString()


def _weights_of(model: NextClickGRU) -> _StepWeights:
    def arr(t: Any) -> np.ndarray:
        return t.detach().cpu().numpy().astype(np.float32, copy=True)

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


def _graph_from_weights(w: _StepWeights) -> onnx.ModelProto:
    n_items, hidden, n_layers = w.n_items, w.hidden_size, len(w.gru)
    inits: list[onnx.TensorProto] = []
    nodes: list[onnx.NodeProto] = []

    def const(name: str, value: np.ndarray) -> str:
        inits.append(numpy_helper.from_array(np.ascontiguousarray(value), name))
        return name

    axis0 = const("axis0", np.array([0], dtype=np.int64))
    nodes.append(helper.make_node("Gather", [const("embedding", w.embedding), "items"], ["x"], axis=0))  # [B, E]
    nodes.append(helper.make_node("Unsqueeze", ["x", axis0], ["x_seq0"]))  # [1, B, E]

    if n_layers == 1:
        h_in = ["hidden"]
    else:
        # Without a `split` input, Split cuts axis 0 into as many equal parts as it has outputs.
        h_in = [f"h_in{k}" for k in range(n_layers)]
        nodes.append(helper.make_node("Split", ["hidden"], h_in, axis=0))  # L x [1, B, H]

    x = "x_seq0"
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

    # O^T is stored [D, n_items] so the MatMul streams it row by row; it is the one big read per call.
    nodes.append(helper.make_node("MatMul", [f, const("output_t", w.output.T)], ["logits"]))  # [B, n_items]
    nodes.append(helper.make_node("Add", ["logits", const("output_bias", w.output_bias)], ["scores"]))  # [B, n_items]
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
    model = helper.make_model(graph, producer_name="cairn", opset_imports=[helper.make_opsetid("", OPSET)])
    model.ir_version = IR_VERSION
    helper.set_model_props(model, {"cairn.graph": GRAPH_FORMAT})
    try:
        onnx.checker.check_model(model, full_check=True)
    except (onnx.checker.ValidationError, onnx.shape_inference.InferenceError) as exc:
        raise ArtifactError(f"the step graph does not pass the ONNX checker: {exc}") from exc
    return model


def _model_fields(c: GRUConfig) -> dict[str, Any]:
    return {
        "kind": "gru",
        "n_items": c.n_items,
        "embedding_size": c.embedding_size,
        "hidden_size": c.hidden_size,
        "layers": c.layers,
        "ff_sizes": list(c.ff_sizes),
        "tie_output": c.tie_output,
    }


def default_version() -> str:
    """A UTC timestamp such as 20261202T101500: sorts in time order as text and as the store sorts."""
    return datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%S")


def export_artifact(
    checkpoint: Path,
    data: Path,
    store: Path,
    name: str,
    version: str,
    neighbours: int = 100,
    regulariser: float = 20.0,
    metrics: dict | None = None,
    overwrite: bool = False,
    names: dict[str, str] | None = None,
) -> Path:
    """Write `<store>/<name>/<version>/` from a training checkpoint and the data it was trained on.

    `names` (item id -> display name) goes into the artifact for the items the model knows; a
    catalogue lists items the prepared data may have dropped, and those are left out.
    From `metrics` (the JSON of `cairn evaluate`), its `decision` part supplies the session-KNN
    parameters (as tuned) and the exclude-seen choice, which become the artifact's session index and
    serving default; without one, the published session-KNN defaults and exclude_seen = true.
    """
    checkpoint, data = Path(checkpoint), Path(data)
    if neighbours < 1:
        raise ArtifactError(f"neighbours must be at least 1, got {neighbours}")
    if not regulariser >= 0:
        raise ArtifactError(f"regulariser must be zero or positive, got {regulariser}")
    if not checkpoint.is_file():
        raise ArtifactError(f"{checkpoint}: no checkpoint file here")
    try:
        model, extra = load_checkpoint(checkpoint)
    except Exception as exc:  # torch raises many kinds (pickle, zip, key, size errors) for a foreign file
        raise ArtifactError(f"{checkpoint}: not a readable cairn GRU checkpoint ({exc.__class__.__name__}: {_one_line(exc)})") from exc
    prepared = PreparedData.load(data)
    if model.config.n_items != prepared.n_items:
        raise InputDataError(
            f"{checkpoint} scores {model.config.n_items} items but {data} has {prepared.n_items}; "
            "export with the prepared data set the model was trained on"
        )
    fingerprint = prepared.fingerprint()
    trained_on = extra.get("data_fingerprint")
    if trained_on is not None and trained_on != fingerprint:
        raise InputDataError(f"{checkpoint} was trained on data {trained_on[:12]}..., but {data} is {fingerprint[:12]}...")

    # Imported here: baselines pulls in scipy, which nothing else in the export needs.
    from offline.evaluate.baselines import ItemKNN
    from offline.evaluate.session_knn import DEFAULT_CANDIDATES, DEFAULT_NEIGHBOURS, DEFAULT_WEIGHTING, session_index

    decision = (metrics or {}).get("decision") if isinstance((metrics or {}).get("decision"), dict) else {}
    tuned = decision.get("session_knn") if isinstance(decision.get("session_knn"), dict) else {}
    sknn = {
        "neighbours": int(tuned.get("neighbours", DEFAULT_NEIGHBOURS)),
        "candidates": int(tuned.get("candidates", DEFAULT_CANDIDATES)),
        "weighting": str(tuned.get("weighting", DEFAULT_WEIGHTING)),
    }
    defaults = decision.get("serving_defaults") if isinstance(decision.get("serving_defaults"), dict) else {}
    exclude_seen = defaults.get("exclude_seen", True)
    if not isinstance(exclude_seen, bool):
        raise InputDataError(f"the metrics' decision.serving_defaults.exclude_seen must be true or false, got {exclude_seen!r}")

    knn = ItemKNN.fit(prepared.train, prepared.n_items, neighbours=neighbours, regulariser=regulariser)
    neighbour_items, neighbour_scores = knn.neighbour_table()  # int32 [n_items, K] (-1 pads), float32 [n_items, K]
    popularity = np.bincount(prepared.train.items, minlength=prepared.n_items).astype(np.float32)  # [n_items]
    sessions = session_index(prepared.train, prepared.n_items, sknn["candidates"])

    hyperparameters = extra.get("hyperparameters", {})
    return write_artifact(
        store,
        name,
        version,
        step_graph=build_step_graph(model),
        item_ids=prepared.item_ids,
        neighbour_items=neighbour_items,
        neighbour_scores=neighbour_scores,
        popularity=popularity,
        manifest_fields={
            "data_fingerprint": fingerprint,
            "model": _model_fields(model.config),
            "hyperparameters": _jsonable(hyperparameters, "the checkpoint's hyperparameters"),
            # this model's own figures, the strongest simple one's beside them, the verdict, provenance
            "metrics": _jsonable(own_metrics(metrics or {}, checkpoint), "the metrics"),
            "neighbour_table": {"kind": "item-knn", "neighbours": neighbours, "regulariser": regulariser},
            "session_knn": sknn,
            "serving_defaults": {"exclude_seen": exclude_seen},
        },
        overwrite=overwrite,
        item_names={i: names[i] for i in prepared.item_ids if i in names} if names else None,
        session_index=sessions,
    )


def own_metrics(report: dict, checkpoint: Path) -> dict:
    """What an artifact records of a `cairn evaluate` report: the exported checkpoint's own row (found
    by its path in the report's provenance), the strongest simple recommender's row for reference,
    the verdict, and where the figures come from. InputDataError when the report evaluated other
    checkpoints only: another model's figures would be recorded as this one's."""
    if not report:
        return {}
    provenance = report.get("provenance") if isinstance(report.get("provenance"), dict) else {}
    decision = report.get("decision") if isinstance(report.get("decision"), dict) else {}
    verdict = decision.get("verdict") if isinstance(decision.get("verdict"), dict) else {}
    out: dict = {"decision": {k: decision[k] for k in ("verdict", "serving_defaults", "session_knn", "exclude_seen") if k in decision}}
    evaluated = provenance.get("checkpoints") if isinstance(provenance.get("checkpoints"), dict) else {}
    if evaluated:
        mine = [name for name, path in evaluated.items() if Path(path).resolve() == Path(checkpoint).resolve()]
        if not mine:
            listed = ", ".join(f"{n} ({p})" for n, p in evaluated.items())
            raise InputDataError(f"--metrics: the report did not evaluate {checkpoint} (it evaluated {listed}); evaluate this checkpoint")
        out["model"] = {"name": mine[0], **_figures(report.get(mine[0]))}
    simple = verdict.get("strongest_simple")
    if isinstance(simple, str) and isinstance(report.get(simple), dict):
        out["strongest_simple"] = {"name": simple, **_figures(report[simple])}
    out["provenance"] = {k: provenance[k] for k in ("data", "split", "k", "bootstrap", "seed", "cairn_version", "created_at") if k in provenance}
    return out


def _figures(row: Any) -> dict:
    """The metric values of one report row, without intervals' details beyond the 95% one."""
    if not isinstance(row, dict):
        return {}
    return {m: v for m, v in row.items() if isinstance(v, dict) and "value" in v}


def write_random_artifact(
    store: Path,
    name: str,
    version: str,
    n_items: int = 40_000,
    hidden_size: int = 100,
    layers: int = 1,
    neighbours: int = 20,
    seed: int = 0,
    overwrite: bool = False,
    item_ids: list[str] | None = None,
    exclude_seen: bool = True,
) -> Path:
    """An artifact with random weights and tables, for benchmarks and service tests (item ids
    sku-000000... unless given).

    The cost of a step depends on the sizes only, not on the weights, so this times the real thing.
    """
    if n_items < 2:
        raise ArtifactError(f"a random artifact needs at least 2 items, got {n_items}")
    if neighbours < 1:
        raise ArtifactError(f"neighbours must be at least 1, got {neighbours}")
    import torch

    torch.manual_seed(seed)
    config = GRUConfig(n_items=n_items, embedding_size=hidden_size, hidden_size=hidden_size, layers=layers)
    try:
        model = NextClickGRU(config).eval()
    except ValueError as exc:
        raise ArtifactError(f"random artifact: {exc}") from exc

    rng = np.random.default_rng(seed)
    k = min(neighbours, n_items - 1)
    # Distinct neighbours other than the item itself: one random offset in each of k equal strides.
    stride = (n_items - 1) // k
    offsets = 1 + np.arange(k) * stride + rng.integers(0, stride, size=(n_items, k))  # [n_items, k], in [1, n_items - 1]
    items = (np.arange(n_items)[:, None] + offsets) % n_items
    items = np.take_along_axis(items, np.argsort(rng.random((n_items, k)), axis=1), axis=1)  # shuffle within rows
    scores = -np.sort(-rng.random((n_items, k)), axis=1)  # descending, like a real table
    table_items = np.full((n_items, neighbours), -1, dtype=np.int32)
    table_scores = np.zeros((n_items, neighbours), dtype=np.float32)
    table_items[:, :k], table_scores[:, :k] = items, scores
    popularity = (1e4 / np.arange(1, n_items + 1))[rng.permutation(n_items)].astype(np.float32)  # Zipf-like counts
    sessions = _random_session_index(n_items, popularity, rng)

    return write_artifact(
        store,
        name,
        version,
        step_graph=build_step_graph(model),
        item_ids=item_ids if item_ids is not None else [f"sku-{i:06d}" for i in range(n_items)],
        neighbour_items=table_items,
        neighbour_scores=table_scores,
        popularity=popularity,
        manifest_fields={
            "data_fingerprint": f"random:{seed}",
            "model": _model_fields(config),
            "hyperparameters": {"random_seed": seed},
            "metrics": {},
            "neighbour_table": {"kind": "random", "neighbours": neighbours},
            "session_knn": {"neighbours": 100, "candidates": sessions.candidates, "weighting": "linear"},
            "serving_defaults": {"exclude_seen": exclude_seen},
        },
        overwrite=overwrite,
        session_index=sessions,
    )


def _random_session_index(n_items: int, popularity: np.ndarray, rng: np.random.Generator, candidates: int = 500):
    """A session-KNN index over random sessions (5 per item, at most a million; 1-8 clicks drawn by
    popularity), so a random artifact costs the served session-KNN what a real one of its size does."""
    from offline.data.dataset import SessionSplit
    from offline.evaluate.session_knn import session_index

    n_sessions = min(5 * n_items, 1_000_000)
    lengths = rng.integers(1, 9, size=n_sessions)
    p = popularity.astype(np.float64)
    p /= p.sum()
    items = rng.choice(n_items, size=int(lengths.sum()), p=p).astype(np.int32)
    offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
    split = SessionSplit(items=items, offsets=offsets, times=np.zeros(len(items), dtype=np.int64))
    return session_index(split, n_items, candidates)


def _jsonable(value: Any, what: str) -> Any:
    try:
        return json.loads(json.dumps(value))
    except (TypeError, ValueError) as exc:
        raise ArtifactError(f"{what} cannot be stored in the manifest as JSON ({exc})") from exc


def _one_line(exc: BaseException, limit: int = 300) -> str:
    # Library messages can run over many lines; the CLI prints one.
    text = " ".join(str(exc).split())
    return text if len(text) <= limit else text[: limit - 3] + "..."
