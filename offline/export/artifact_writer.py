"""Export a trained GRU as a model artifact: the ONNX graphs (offline/export/onnx_graph.py) plus the
fallback tables (item-KNN neighbours, popularity, the session-KNN index), its own metrics and
provenance; and random-weight artifacts of any size for benchmarks and tests."""

from __future__ import annotations

import json
from concurrent.futures import Future, ThreadPoolExecutor
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np

from service.artifacts.format import write_artifact
from service.artifacts.item_clusters import ITEM_CLUSTER_FILES
from service.artifacts.item_vectors import PRECISIONS, default_precisions, item_vectors_manifest
from service.errors import ArtifactError, InputDataError
from offline.data.dataset import PreparedData, SessionSplit
from offline.model.gru import GRUConfig, NextClickGRU, load_checkpoint

from offline.export.item_clusters import CLUSTERS_FROM, item_cluster_files
from offline.export.onnx_graph import graph_from_weights, item_vector_files, weights_of

_TABLE_SLICE = 65_536  # rows of a random neighbour table made at a time
CALIBRATION_STATES = 512  # visit states the clustered index's probe count is chosen on


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
    clusters: bool | None = None,
    precisions: tuple[str, ...] | None = None,
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

    # The index builds in its own thread while the fallback tables are made here.
    index = start_index(model, prepared.valid if prepared.valid.n_sessions else prepared.train, clusters)
    knn = ItemKNN.fit(prepared.train, prepared.n_items, neighbours=neighbours, regulariser=regulariser)
    neighbour_items, neighbour_scores = knn.neighbour_table()  # int32 [n_items, K] (-1 pads), float32 [n_items, K]
    popularity = np.bincount(prepared.train.items, minlength=prepared.n_items).astype(np.float32)  # [n_items]
    sessions = session_index(prepared.train, prepared.n_items, sknn["candidates"])

    hyperparameters = extra.get("hyperparameters", {})
    return _write_model_artifact(
        store,
        name,
        version,
        model,
        item_ids=prepared.item_ids,
        neighbour_items=neighbour_items,
        neighbour_scores=neighbour_scores,
        popularity=popularity,
        manifest_fields={
            "data_fingerprint": fingerprint,
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
        index=index,
        precisions=precisions,
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
    clusters: bool | None = None,
    precisions: tuple[str, ...] | None = None,
) -> Path:
    """An artifact with random weights and tables, for benchmarks and service tests (item ids
    sku-000000... unless given).

    The cost of a step depends on the sizes only, not on the weights, so this times the real thing.
    """
    if n_items < 2:
        raise ArtifactError(f"a random artifact needs at least 2 items, got {n_items}")
    if neighbours < 1:
        raise ArtifactError(f"neighbours must be at least 1, got {neighbours}")
    config = GRUConfig(n_items=n_items, embedding_size=hidden_size, hidden_size=hidden_size, layers=layers)
    try:
        config.validate()
    except ValueError as exc:
        raise ArtifactError(f"random artifact: {exc}") from exc
    # torch fills the model's tables in a second thread while numpy draws the visits here (both let
    # go of the GIL: at a million items each takes about a second); with both, the clustered index's
    # thread starts, and the neighbour table and the session index are made beside it.
    rng = np.random.default_rng(seed)
    with ThreadPoolExecutor(max_workers=1, thread_name_prefix="random-model") as pool:
        made = pool.submit(random_model, config, seed)
        popularity = (1e4 / np.arange(1, n_items + 1))[rng.permutation(n_items)].astype(np.float32)  # Zipf-like counts
        visits = _random_sessions(n_items, popularity, rng)
        model = made.result()
    index = start_index(model, visits, clusters)
    table_items, table_scores = _random_neighbours(n_items, neighbours, rng)
    sessions = _random_session_index(visits, n_items)

    return _write_model_artifact(
        store,
        name,
        version,
        model,
        item_ids=item_ids if item_ids is not None else [f"sku-{i:06d}" for i in range(n_items)],
        neighbour_items=table_items,
        neighbour_scores=table_scores,
        popularity=popularity,
        manifest_fields={
            "data_fingerprint": f"random:{seed}",
            "hyperparameters": {"random_seed": seed},
            "metrics": {},
            "neighbour_table": {"kind": "random", "neighbours": neighbours},
            "session_knn": {"neighbours": 100, "candidates": sessions.candidates, "weighting": "linear"},
            "serving_defaults": {"exclude_seen": exclude_seen},
        },
        overwrite=overwrite,
        session_index=sessions,
        index=index,
        precisions=precisions,
    )


def _random_neighbours(n_items: int, neighbours: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """A random artifact's neighbour table: items int32 [n_items, neighbours], scores float32, descending."""
    k = min(neighbours, n_items - 1)
    # Distinct neighbours other than the item itself: one random offset in each of k equal strides.
    # Made in slices of rows in int32, so a million items need no 160 MB int64/float64 temporaries.
    stride = (n_items - 1) // k
    table_items = np.full((n_items, neighbours), -1, dtype=np.int32)
    table_scores = np.zeros((n_items, neighbours), dtype=np.float32)
    for lo in range(0, n_items, _TABLE_SLICE):
        rows = np.arange(lo, min(n_items, lo + _TABLE_SLICE), dtype=np.int64)
        offsets = 1 + np.arange(k) * stride + rng.integers(0, stride, size=(len(rows), k))  # [rows, k], in [1, n_items - 1]
        items = ((rows[:, None] + offsets) % n_items).astype(np.int32)
        table_items[rows[0] : rows[-1] + 1, :k] = rng.permuted(items, axis=1)  # shuffle within rows
        scores = rng.random((len(rows), k), dtype=np.float32)
        table_scores[rows[0] : rows[-1] + 1, :k] = -np.sort(-scores, axis=1)  # descending, like a real table
    return table_items, table_scores


def random_model(config: GRUConfig, seed: int) -> NextClickGRU:
    """A model with the training init (NextClickGRU.reset_parameters) from `seed`."""
    import torch

    torch.manual_seed(seed)
    return NextClickGRU(config).eval()


def start_index(model: NextClickGRU, visits: SessionSplit, clusters: bool | None) -> Future | None:
    """The clustered index, built in a second thread from now on (numpy, torch and the export's
    file writes let go of the GIL: at a million items both sides take seconds), calibrated on states
    of `visits`: `clusters` True always, False never (None is returned), None from CLUSTERS_FROM
    items on and only when `CAIRN_SCORING=auto` would serve it (else its manifest section says why)."""
    if not (clusters or (clusters is None and model.config.n_items >= CLUSTERS_FROM)):
        return None
    features = visit_features(model, visits, np.random.default_rng(0))
    weights = weights_of(model)  # views of the model's tables
    builder = ThreadPoolExecutor(max_workers=1, thread_name_prefix="item-clusters")
    index = builder.submit(item_cluster_files, weights.output, weights.output_bias, features, only_if_served=clusters is None)
    builder.shutdown(wait=False)
    return index


def _write_model_artifact(
    store: Path,
    name: str,
    version: str,
    model: NextClickGRU,
    manifest_fields: dict[str, Any],
    index: Future | None = None,
    precisions: tuple[str, ...] | None = None,
    **tables: Any,
) -> Path:
    """`write_artifact` for a GRU: its step graph (item tables as external data), the item-vector
    files (the reduced copies of `precisions`; None: default_precisions for the model's catalogue),
    the clustered index (`start_index`'s, its files last), and the model's own manifest fields."""
    weights = weights_of(model)
    if precisions is None:
        precisions = default_precisions(model.config.n_items)
    vector_files = item_vector_files(weights, precisions)
    precisions = tuple(p for p in PRECISIONS if p in precisions)  # the manifest lists them in one order
    # The tables that are ready are written first, then the reduced copies, made as they are
    # written, while the index is being built; its files come last.
    extra: dict[str, Any] = {f: c for f, c in vector_files.items() if not callable(c)}
    extra.update({f: c for f, c in vector_files.items() if callable(c)})
    fields: dict[str, Any] = {**manifest_fields, "model": _model_fields(model.config), "item_vectors": item_vectors_manifest(precisions)}
    if index is not None:

        def index_file(fname: str) -> Any:
            files, _ = index.result()
            return None if files is None else files[fname]

        extra.update({f: (lambda f=f: index_file(f)) for f in ITEM_CLUSTER_FILES})
        fields["item_clusters"] = lambda: index.result()[1] if index.result()[0] is not None else None
        fields["item_clusters_skipped"] = lambda: index.result()[1] if index.result()[0] is None else None
    return write_artifact(store, name, version, step_graph=graph_from_weights(weights, external=True).SerializeToString(),
                          extra_files=extra, manifest_fields=fields, **tables)  # fmt: skip


def visit_features(model: NextClickGRU, visits: SessionSplit, rng: np.random.Generator, states: int = CALIBRATION_STATES) -> np.ndarray:
    """The model's output features after a random prefix (1 to 10 clicks, leaving at least one
    click to come) of `states` visits drawn from `visits`: float32 [states, D]."""
    import torch

    lengths = visits.lengths()
    pool = np.flatnonzero(lengths >= 2)
    if len(pool) == 0:
        pool = np.flatnonzero(lengths >= 1)
    if len(pool) == 0:
        raise ArtifactError("no visits to calibrate the clustered index on")
    picked = pool[rng.integers(0, len(pool), states)]
    keep = np.maximum(1, np.minimum(lengths[picked] - 1, 10))  # [states] most clicks a prefix may have
    prefix_lengths = 1 + (rng.random(states) * keep).astype(np.int64)  # [states] in 1..keep
    out = np.empty((states, model.config.output_size), dtype=np.float32)
    model.eval()
    with torch.no_grad():
        for length in np.unique(prefix_lengths).tolist():
            rows = np.flatnonzero(prefix_lengths == length)
            starts = visits.offsets[picked[rows]]  # [b]
            clicks = torch.as_tensor(visits.items[starts[:, None] + np.arange(length)].astype(np.int64))  # [b, length]
            hidden = model.init_hidden(len(rows))
            for t in range(length):
                features, hidden = model.step(clicks[:, t], hidden)
            out[rows] = features.numpy()
    return out


def _random_sessions(n_items: int, popularity: np.ndarray, rng: np.random.Generator) -> SessionSplit:
    """Random sessions (5 per item, at most a million; 1-8 clicks drawn by popularity)."""
    n_sessions = min(5 * n_items, 1_000_000)
    lengths = rng.integers(1, 9, size=n_sessions)
    p = popularity.astype(np.float64)
    p /= p.sum()
    cdf = np.cumsum(p)
    # Inverse-CDF draws, as rng.choice(p=...) makes them, but from sorted uniforms (the binary
    # searches then walk the table in order: a third faster at a million items), then shuffled:
    # a random order of an i.i.d. sample's sorted values is again an i.i.d. sample.
    ranks = np.searchsorted(cdf / cdf[-1], np.sort(rng.random(int(lengths.sum()))), side="right")
    items = rng.permutation(np.minimum(ranks, n_items - 1)).astype(np.int32)
    offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
    return SessionSplit(items=items, offsets=offsets, times=np.zeros(len(items), dtype=np.int64))


def _random_session_index(split: SessionSplit, n_items: int, candidates: int = 500):
    """A session-KNN index over `_random_sessions`, so a random artifact costs the served
    session-KNN what a real one of its size does."""
    from offline.evaluate.session_knn import session_index

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

