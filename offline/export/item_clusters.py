"""Build the clustered item index of an artifact (the files: service/artifacts/item_clusters.py).

    1. the head: the HEAD_SHARE of items with the largest |[v, b]|, scored on every click
    2. map each other item's [v, b] onto a sphere: [v, b, sqrt(M^2 - |[v, b]|^2)] (Bachrach et al. 2014)
    3. k-means (Lloyd) on a sample of the mapped items: random distinct starting points, empty
       clusters re-seeded from the sample; then every item to its nearest centre
    4. order the rows: the head first, then one contiguous block of [v, b] rows per cluster
    5. choose `probe`: the fewest clusters that, with the head, hold at least AGREEMENT_TARGET of
       the exact top 20, on average over visit states of the model itself (the calibration states)
    An automatic export chooses `probe` right after the k-means, from the clusters of the exact
    top items alone, and assigns every item only when `CAIRN_SCORING=auto` would serve an index
    of that fit; otherwise it builds none (random weights: nothing to cluster).

Why a head: a trained model's largest vectors belong to items that rank high for many different
visits, so they sit in the top 20 of visits near any cluster; and with them out of the mapping,
M drops and the remaining items lie closer together on the sphere. Treating items by norm apart
is the idea of norm-ranging search (Yan et al., NeurIPS 2018). Measured on a model trained on a
105,402-item demo shop: with 256 clusters, 99% agreement needed 110 probed clusters without a
head and 16 with a head of 2% (41% vs 8% of the rows read per click).

Step 5 needs no approximate search: an item of the exact top 20 that is scored (head or probed
cluster) is in the approximate top 20 too (at most 19 items score above it among all items, so
among fewer as well), so the overlap at `probe` P is the number of exact top-20 items in the head
or in a cluster ranked below P.
Everything runs in slices of items, so a million items need no [n_items, C] or [states, n_items]
temporaries.
"""

from __future__ import annotations

import math
import time
from collections.abc import Iterator
from typing import Any

import numpy as np

from service.artifacts.format import RowBlocks
from service.artifacts.item_clusters import (
    AGREEMENT_TOP,
    AUTO_CLUSTERED_MAX_SHARE,
    CLUSTER_CENTRES,
    CLUSTER_ITEMS,
    CLUSTER_OFFSETS,
    CLUSTER_VECTORS,
    ClusterFit,
    item_clusters_manifest,
)

AGREEMENT_TARGET = 0.999  # the export picks the fewest clusters that reach this top-20 agreement (0.99 cost the demo shop 1.0% of its Recall@20; 0.995 cost a 631,430-item one 1.55%)
CLUSTERS_FROM = 1_000  # smaller catalogues get no index (the service's `auto` uses one from 100,000 items only)
HEAD_SHARE = 0.02  # of the items, by largest |[v, b]|: scored on every click (see the docstring)
SAMPLE_PER_CLUSTER = 32  # k-means trains on this many items per cluster (at most all of them)
ITERATIONS = 10
_SLICE = 65_536  # items handled at a time
_GROUP = 64  # columns per group in exact_top


def cluster_count(n_items: int) -> int:
    """About sqrt(n_items) clusters (common practice for inverted-file indexes), a power of two:
    1,024 at a million items, 512 at 200,000."""
    return int(2 ** round(math.log2(max(16.0, math.sqrt(n_items)))))


def mapped(vectors: np.ndarray, bias: np.ndarray, max_norm: float) -> np.ndarray:
    """[v, b, sqrt(M^2 - |[v, b]|^2)] for a slice of items: float32 [m, D + 2]."""
    out = np.empty((len(vectors), vectors.shape[1] + 2), dtype=np.float32)
    out[:, :-2] = vectors
    out[:, -2] = bias
    sq = np.einsum("ij,ij->i", out[:, :-1], out[:, :-1], dtype=np.float64)  # in float64, without a float64 copy of the slice
    out[:, -1] = np.sqrt(np.maximum(max_norm**2 - sq, 0.0))
    return out


def nearest(points: np.ndarray, centres: np.ndarray) -> np.ndarray:
    """Index of each point's nearest centre (Euclidean): argmax of p . c - |c|^2 / 2, int64 [m]."""
    half = 0.5 * (centres.astype(np.float64) ** 2).sum(axis=1).astype(np.float32)
    out = np.empty(len(points), dtype=np.int64)
    step = 8192  # points at a time: a [8192, C] distance block (32 MB at 1,024 clusters)
    # One block buffer for every slice: fresh 32 MB blocks cost page faults that took longer than the product.
    block = np.empty((min(step, len(points)), len(centres)), dtype=np.float32)
    for lo in range(0, len(points), step):
        part = block[: len(points[lo : lo + step])]
        np.matmul(points[lo : lo + step], centres.T, out=part)
        out[lo : lo + step] = np.argmax(np.subtract(part, half, out=part), axis=1)
    return out


def kmeans(
    points: np.ndarray, n_clusters: int, rng: np.random.Generator, iterations: int = ITERATIONS, init: np.ndarray | None = None
) -> np.ndarray:
    """Lloyd's k-means from `init` (default: distinct random points): float32 centres [n_clusters, d]."""
    centres = (points[rng.choice(len(points), n_clusters, replace=False)] if init is None else init).astype(np.float32, copy=True)
    for _ in range(iterations):
        assign = nearest(points, centres)
        counts = np.bincount(assign, minlength=n_clusters)
        # One weighted bincount per coordinate: np.add.at over rows is ten times slower.
        sums = np.stack([np.bincount(assign, weights=points[:, j], minlength=n_clusters) for j in range(points.shape[1])], axis=1)
        filled = counts > 0
        centres[filled] = (sums[filled] / counts[filled, None]).astype(np.float32)
        empty = np.flatnonzero(~filled)
        if len(empty):
            centres[empty] = points[rng.choice(len(points), len(empty), replace=False)]
    return centres


def exact_top(features: np.ndarray, vectors: np.ndarray, bias: np.ndarray, k: int = AGREEMENT_TOP, step: int = 16_384) -> np.ndarray:
    """The exact top-k item indices of each feature row (order within the k not kept): int64 [S, k].
    Slices of `step` items (the best k of a slice, then over the kept k + k), so the temporaries stay
    at [S, step] (32 MB for 512 states).

    A slice's best k come from its best k groups of _GROUP columns by their maximum: a column
    of the best k lies in a group whose maximum is at least its score, and at most k - 1 other
    groups can have a larger maximum (each holds a larger score). torch.topk over a whole slice
    cost 40% of the export's calibration; a maximum over groups is one vectorised pass."""
    import torch

    f = torch.from_numpy(np.ascontiguousarray(features, dtype=np.float32))
    best_scores = torch.empty((len(features), 0))
    best_items = torch.empty((len(features), 0), dtype=torch.int64)
    # One score buffer for every slice: a fresh [S, step] block per slice cost more in page faults than the product.
    buffer = torch.empty((len(features), min(step, len(vectors))))
    within = torch.arange(_GROUP)
    with torch.no_grad():
        for lo in range(0, len(vectors), step):
            v = torch.from_numpy(np.ascontiguousarray(vectors[lo : lo + step], dtype=np.float32))
            scores = buffer[:, : len(v)]
            torch.addmm(torch.from_numpy(np.ascontiguousarray(bias[lo : lo + step], dtype=np.float32)), f, v.T, out=scores)  # [S, slice]
            groups = len(v) // _GROUP
            if len(v) % _GROUP == 0 and groups > k:
                best_groups = torch.topk(scores.view(len(f), groups, _GROUP).amax(dim=2), k, dim=1).indices  # [S, k]
                columns = (best_groups[:, :, None] * _GROUP + within).reshape(len(f), k * _GROUP)  # [S, k * _GROUP]
                top = torch.topk(scores.gather(1, columns), k, dim=1)
                values, indices = top.values, columns.gather(1, top.indices)
            else:  # a short or uneven last slice
                top = torch.topk(scores, min(k, scores.shape[1]), dim=1)
                values, indices = top.values, top.indices
            both_scores = torch.cat([best_scores, values], dim=1)
            both_items = torch.cat([best_items, indices + lo], dim=1)
            keep = torch.topk(both_scores, min(k, both_scores.shape[1]), dim=1).indices
            best_scores, best_items = both_scores.gather(1, keep), both_items.gather(1, keep)
    return best_items.numpy()


def choose_probe(features: np.ndarray, centres: np.ndarray, cluster_of_top: np.ndarray, target: float) -> tuple[int, float, np.ndarray]:
    """The fewest probed clusters with mean top-k agreement >= target: (probe, its agreement, the
    agreement at every probe count 1..C). cluster_of_top int64 [S, k] is each exact top item's
    cluster, -1 for an item of the head (always scored)."""
    q = np.concatenate([features, np.ones((len(features), 1), dtype=np.float32)], axis=1)  # [S, D + 1]
    half = 0.5 * (centres.astype(np.float64) ** 2).sum(axis=1).astype(np.float32)
    key = q @ centres[:, :-1].T - half  # [S, C]
    n_clusters = key.shape[1]
    rank = np.empty_like(key, dtype=np.int64)
    rank[np.arange(len(key))[:, None], np.argsort(-key, axis=1, kind="stable")] = np.arange(n_clusters)  # cluster -> its rank
    top_rank = np.where(cluster_of_top < 0, 0, np.take_along_axis(rank, np.maximum(cluster_of_top, 0), 1))  # [S, k]; head: found at any probe
    k = cluster_of_top.shape[1]
    found = np.bincount(top_rank.ravel(), minlength=n_clusters).cumsum() / (len(key) * k)  # [C]: agreement at probe 1..C
    probe = min(int(np.searchsorted(found, target - 1e-9)) + 1, n_clusters)
    return probe, float(found[probe - 1]), found


def cluster_rows(vectors: np.ndarray, bias: np.ndarray, order: np.ndarray) -> Iterator[np.ndarray]:
    """Blocks of float32 [m, D + 1] rows, _SLICE at a time: row r is [v, b] of item order[r]. The rows
    are gathered in torch's threads (numpy's fancy indexing takes one core: 1.1 s at a million
    items), and written block by block, so the 400 MB table never exists whole."""
    import torch

    table = torch.from_numpy(np.ascontiguousarray(vectors, dtype=np.float32))
    for lo in range(0, len(order), _SLICE):
        part = order[lo : lo + _SLICE]
        rows = np.empty((len(part), vectors.shape[1] + 1), dtype=np.float32)
        rows[:, :-1] = torch.index_select(table, 0, torch.from_numpy(part.astype(np.int64))).numpy()
        rows[:, -1] = bias[part]
        yield rows


def item_cluster_files(
    vectors: np.ndarray,
    bias: np.ndarray,
    features: np.ndarray,
    seed: int = 0,
    target: float = AGREEMENT_TARGET,
    head_share: float = HEAD_SHARE,
    only_if_served: bool = False,
) -> tuple[dict[str, Any] | None, dict[str, Any]]:
    """The index files and the manifest's `item_clusters` section for output vectors float32 [n, D],
    bias [n], and calibration features float32 [S, D] (the model's, over visit states).

    `only_if_served`: first calibrate the probe count on the centres and the exact top items alone,
    and when `CAIRN_SCORING=auto` would not serve an index of that fit (ClusterFit.served_by_auto:
    random weights need most clusters probed) build nothing: (None, the section of the
    `item_clusters_skipped` manifest field, saying why). At a million random items that leaves out
    the assignment of every item and a 400 MB file."""
    t0 = time.perf_counter()
    n = len(vectors)
    rng = np.random.default_rng(seed)
    norms = np.empty(n, dtype=np.float64)
    for lo in range(0, n, _SLICE):
        v = vectors[lo : lo + _SLICE]
        norms[lo : lo + _SLICE] = np.sqrt(np.einsum("ij,ij->i", v, v, dtype=np.float64) + bias[lo : lo + _SLICE].astype(np.float64) ** 2)
    n_head = min(int(math.ceil(head_share * n)), n - 1)
    by_norm = np.argsort(-norms, kind="stable")
    head, rest = np.sort(by_norm[:n_head]), np.sort(by_norm[n_head:])  # item indices, ascending
    n_clusters = min(cluster_count(len(rest)), len(rest))
    max_norm = float(norms[rest].max())
    sample = rest[np.sort(rng.choice(len(rest), min(len(rest), SAMPLE_PER_CLUSTER * n_clusters), replace=False))]
    centres = kmeans(mapped(vectors[sample], bias[sample], max_norm), n_clusters, rng)
    top = exact_top(features, vectors, bias)  # [S, k]
    if only_if_served:
        # The clusters of the exact top items only (-1: the head), as the full assignment below gives them.
        found = np.unique(top)
        of_found = nearest(mapped(vectors[found], bias[found], max_norm), centres)
        of_found[np.isin(found, head, assume_unique=True)] = -1
        probe, agreement, _ = choose_probe(features, centres, of_found[np.searchsorted(found, top)], target)
        fit = ClusterFit.of(n, n_clusters, n_head, probe, agreement)
        if not fit.served_by_auto:
            return None, {
                "clusters": int(n_clusters), "head": int(n_head), "probe_needed": int(probe),
                "agreement_top20": round(float(agreement), 4), "agreement_states": len(features), "read_share": round(fit.read_share, 4),
                "reason": f"{target:.1%} top-20 agreement needs {probe} of {n_clusters} clusters probed, {fit.read_share:.0%} of the item rows "
                f"read a click; CAIRN_SCORING=auto serves an index that reads at most {AUTO_CLUSTERED_MAX_SHARE:.0%}",
                "build_s": round(time.perf_counter() - t0, 2),
            }  # fmt: skip
    assign = np.full(n, -1, dtype=np.int64)  # -1: the head
    for lo in range(0, len(rest), _SLICE):
        part = rest[lo : lo + _SLICE]
        assign[part] = nearest(mapped(vectors[part], bias[part], max_norm), centres)
    in_clusters = rest[np.argsort(assign[rest], kind="stable")]  # cluster by cluster
    order = np.concatenate([head, in_clusters])  # [n]: the head, then the clusters
    offsets = n_head + np.concatenate([[0], np.cumsum(np.bincount(assign[rest], minlength=n_clusters))]).astype(np.int64)
    probe, agreement, _ = choose_probe(features, centres, assign[top], target)
    files = {
        CLUSTER_CENTRES: centres, CLUSTER_OFFSETS: offsets, CLUSTER_ITEMS: order.astype(np.int64),
        CLUSTER_VECTORS: RowBlocks((n, vectors.shape[1] + 1), np.dtype(np.float32), lambda: cluster_rows(vectors, bias, order)),
    }  # fmt: skip
    section = item_clusters_manifest(n_clusters, probe, agreement, len(features), n_head)
    section["build_s"] = round(time.perf_counter() - t0, 2)
    return files, section
