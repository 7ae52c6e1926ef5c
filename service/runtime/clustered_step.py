"""One GRU step with approximate top-N from the clustered item index (service/artifacts/item_clusters.py).

    x = embedding[items]                        numpy, rows of a read-only memory map
    next_hidden, f = features.onnx(x, hidden)   ONNX Runtime, the GRU without item tables
    q = [f, 1]                                  the bias is the last coordinate of each row
    rank clusters by q . c - |c|^2 / 2          numpy, [B, C]: the nearest centres first
    score the head and the members of the       numpy, float32, exact: contiguous slices of
      best `probe` clusters (more when they      the cluster-ordered vectors, one product each
      hold fewer than top_n items), keep top_n

Every score an answer carries is exact; what can differ from exact scoring is only which items
compete: an item in a cluster that was not probed is never seen. The pages of the probed slices are
the OS's page cache, shared by every worker. Same call contract as `OnnxStep.run`.
"""

from __future__ import annotations

import numpy as np

from service.artifacts.item_clusters import ItemClusters
from service.artifacts.item_vectors import ItemVectors
from service.errors import StepError
from service.runtime.feature_step import FeatureStep, touch_pages


class ClusterSearch:
    """Approximate top-N by inner product over the clustered index; numpy only, exact scores."""

    def __init__(self, clusters: ItemClusters) -> None:
        self.clusters = clusters
        self.probe = clusters.probe
        self._sizes = np.diff(clusters.offsets)  # [C] items per cluster

    def top(self, query: np.ndarray, top_n: int) -> tuple[np.ndarray, np.ndarray]:
        """query float32 [B, D + 1] (features and a last 1 for the bias) -> items int64 [B, top_n],
        scores float32 [B, top_n], best first."""
        key = query @ self.clusters.centres.T - self.clusters.centre_half_norms  # [B, C], larger = nearer
        # The head is every row's: one product for the batch reads it once, not once per row.
        head_scores = np.ascontiguousarray((self.clusters.vectors[: self.clusters.head] @ query.T).T)  # [B, head]
        top_items = np.empty((len(query), top_n), dtype=np.int64)
        top_scores = np.empty((len(query), top_n), dtype=np.float32)
        for row in range(len(query)):
            top_items[row], top_scores[row] = self._row_top(query[row], key[row], top_n, head_scores[row])
        return top_items, top_scores

    def _probed(self, key: np.ndarray, top_n: int) -> np.ndarray:
        """The clusters to score for one query: the `probe` nearest, or more while they hold fewer than top_n items."""
        probe = self.probe
        if probe < len(key):
            nearest = np.argpartition(-key, probe - 1)[:probe]
            if self._sizes[nearest].sum() >= top_n:
                return nearest
        ranked = np.argsort(-key, kind="stable")
        enough = int(np.searchsorted(np.cumsum(self._sizes[ranked]), top_n)) + 1
        return ranked[: max(probe, enough)]

    def _row_top(self, q: np.ndarray, key: np.ndarray, top_n: int, head_scores: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        head = self.clusters.head
        clusters = np.sort(self._probed(key, max(1, top_n - head)))
        offsets, vectors = self.clusters.offsets, self.clusters.vectors
        starts, ends = offsets[clusters], offsets[clusters + 1]  # [P] row ranges of the probed clusters, in row order
        # Neighbouring ranges become one: fewer, longer products (many, when most clusters are probed).
        breaks = np.flatnonzero(starts[1:] != ends[:-1]) + 1
        starts, ends = starts[np.concatenate([[0], breaks])], ends[np.concatenate([breaks - 1, [len(ends) - 1]])]
        scores = np.concatenate([head_scores, *(vectors[a:b] @ q for a, b in zip(starts.tolist(), ends.tolist()))])  # [m], exact float32
        starts, ends = np.concatenate([[0], starts]), np.concatenate([[head], ends])  # the head's range first (empty without one)
        ends_cum = np.cumsum(ends - starts)  # [R] where each range's scores end in `scores`
        best = np.argpartition(-scores, top_n - 1)[:top_n] if top_n < len(scores) else np.arange(len(scores))
        best = best[np.argsort(-scores[best], kind="stable")]
        part = np.searchsorted(ends_cum, best, side="right")  # which range each position is in
        rows = starts[part] + best - (ends_cum[part] - (ends - starts)[part])
        return self.clusters.items[rows], scores[best]


class ClusteredStep(FeatureStep):
    """`OnnxStep`'s `run` for an artifact with item vectors and the clustered index."""

    scoring = "clustered"

    def __init__(self, tables: ItemVectors, clusters: ItemClusters, threads: int = 1) -> None:
        if clusters.n_items != tables.n_items or clusters.vectors.shape[1] != tables.vectors.shape[1] + 1:
            raise StepError(f"the clustered index ({clusters.vectors.shape}) does not fit the item vectors ({tables.vectors.shape})")
        super().__init__(tables, threads)
        self.search = ClusterSearch(clusters)
        self._dim = tables.vectors.shape[1]
        touch_pages(clusters.vectors)

    def rank(self, features: np.ndarray, top_n: int) -> tuple[np.ndarray, np.ndarray]:
        query = np.empty((len(features), self._dim + 1), dtype=np.float32)  # [B, D + 1]
        query[:, : self._dim] = features
        query[:, self._dim] = 1.0
        return self.search.top(query, top_n)
