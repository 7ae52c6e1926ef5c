"""Optional artifact files for approximate top-N over large catalogues: the items in clusters.

An inverted-file index (Sivic & Zisserman 2003; Jegou et al., IEEE TPAMI 2011) over the output
vectors. The export sets apart a head (the 2% of items with the largest vectors, scored on every
click) and groups the other items by k-means; a click scores the cluster centres first, then
exactly, in float32, the head and the members of the `probe` best clusters: at a million items,
the 20,000-item head and 32 of 1,024 clusters read 5% of the vectors. The service uses these files
together with `features.onnx` and `embedding.npy` (service/artifacts/item_vectors.py).

The score is an inner product with a bias, s = f . v + b = [f, 1] . [v, b]. K-means groups points
by distance, not by inner product, so the export maps each item to [v, b, sqrt(M^2 - |[v, b]|^2)]
(M the largest norm: every item then lies on one sphere) and the query to [f, 1, 0], where the
largest inner product is the nearest point (Bachrach et al., RecSys 2014). A cluster's rank for a
query is its centre's distance in that space: q . c - |c|^2 / 2, larger first.

    cluster_centres.npy    float32 [C, D + 2], centres in the mapped space
    cluster_offsets.npy    int64 [C + 1], cluster c holds rows offsets[c] .. offsets[c + 1] - 1;
                           rows 0 .. offsets[0] - 1 are the head
    cluster_items.npy      int64 [n_items], the item index of each row
    cluster_vectors.npy    float32 [n_items, D + 1], rows [v, b]: the head, then cluster by cluster

The manifest's `item_clusters` section holds the cluster count, the head's size, `probe`
(clusters scored per click) and the agreement the export measured for it: the mean share of the exact top 20 that the
probed clusters hold, over visit states of the model itself. Every file is in the checksums.
numpy only.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from service.artifacts.mapped import mapped_array
from service.errors import ArtifactError

CLUSTER_CENTRES = "cluster_centres.npy"
CLUSTER_OFFSETS = "cluster_offsets.npy"
CLUSTER_ITEMS = "cluster_items.npy"
CLUSTER_VECTORS = "cluster_vectors.npy"
ITEM_CLUSTER_FILES = (CLUSTER_CENTRES, CLUSTER_OFFSETS, CLUSTER_ITEMS, CLUSTER_VECTORS)
ITEM_CLUSTERS_FORMAT = "cairn-item-clusters/1"
AGREEMENT_TOP = 20  # the agreement in the manifest is over the top 20, the list a page shows
# `CAIRN_SCORING=auto` serves the clustered index only when the export measured at least this
# top-20 agreement with exact scoring at its probe count (random weights, with no structure to
# cluster, do not) and that probe count reads at most this share of the item rows (beyond it a
# full pass of the int4 table, a fifth of the float32 bytes, is faster). An automatic export
# builds no index that `auto` would not serve (offline/export/item_clusters.py).
AUTO_CLUSTERED_AGREEMENT = 0.99
AUTO_CLUSTERED_MAX_SHARE = 0.25


@dataclass(frozen=True)
class ClusterFit:
    """What the export measured for its probe count: the top-20 agreement with exact scoring, and
    the share of the item rows a click reads (head + probe clusters of average size)."""

    agreement: float
    read_share: float

    @classmethod
    def of(cls, n_items: int, n_clusters: int, head: int, probe: int, agreement: float) -> ClusterFit:
        """The fit of an index whose clusters hold the non-head items in equal shares on average."""
        return cls(agreement=float(agreement), read_share=(head + probe * (n_items - head) / n_clusters) / n_items)

    @property
    def served_by_auto(self) -> bool:
        """Whether `CAIRN_SCORING=auto` takes the clustered index with this fit."""
        return self.agreement >= AUTO_CLUSTERED_AGREEMENT and self.read_share <= AUTO_CLUSTERED_MAX_SHARE


@dataclass
class ItemClusters:
    centres: np.ndarray  # float32 [C, D + 1]: the centres' first D + 1 coordinates (the query's last is 0)
    centre_half_norms: np.ndarray  # float32 [C], |c|^2 / 2 over all D + 2 coordinates
    offsets: np.ndarray  # int64 [C + 1]; offsets[0] = the head's rows
    items: np.ndarray  # int64 [n_items], read-only memory map
    vectors: np.ndarray  # float32 [n_items, D + 1], read-only memory map
    probe: int  # clusters scored per click
    fit: ClusterFit  # measured by the export at its own probe count

    @property
    def head(self) -> int:
        return int(self.offsets[0])

    @property
    def n_clusters(self) -> int:
        return len(self.offsets) - 1

    @property
    def n_items(self) -> int:
        return self.vectors.shape[0]


def item_clusters_manifest(n_clusters: int, probe: int, agreement: float, states: int, head: int) -> dict[str, Any]:
    """The manifest's `item_clusters` section, written by the export."""
    return {
        "format": ITEM_CLUSTERS_FORMAT,
        "clusters": int(n_clusters),
        "head": int(head),
        "probe": int(probe),
        "agreement_top20": round(float(agreement), 4),
        "agreement_states": int(states),
    }


def has_item_clusters(manifest: dict[str, Any]) -> bool:
    files = manifest.get("files")
    return isinstance(manifest.get("item_clusters"), dict) and isinstance(files, dict) and all(f in files for f in ITEM_CLUSTER_FILES)


def cluster_fit(manifest: dict[str, Any], n_items: int) -> ClusterFit | None:
    """What the export measured, from the manifest alone (no file is opened: `auto` decides on it
    before any table is mapped); None without an index. ArtifactError when the section's numbers
    cannot be an index of `n_items` items."""
    if not has_item_clusters(manifest):
        return None
    section = manifest["item_clusters"]
    clusters, head, probe = section.get("clusters"), section.get("head"), section.get("probe")
    whole = all(isinstance(v, int) and not isinstance(v, bool) for v in (clusters, head, probe))
    if not whole or not (1 <= clusters <= n_items and 0 <= head < n_items and 1 <= probe <= clusters):
        raise ArtifactError(
            f"manifest item_clusters: clusters {clusters!r}, head {head!r}, probe {probe!r} do not describe an index of {n_items} items"
        )
    agreement = section.get("agreement_top20", 0.0)
    return ClusterFit.of(n_items, clusters, head, probe, float(agreement) if isinstance(agreement, (int, float)) else 0.0)


def load_item_clusters(path: Path, manifest: dict[str, Any], n_items: int, probe: int = 0) -> ItemClusters | None:
    """The index of a verified artifact (large arrays as read-only memory maps), None when it has
    none; ArtifactError when a file or the manifest section does not fit. `probe` > 0 overrides the
    manifest's (capped at the cluster count)."""
    path = Path(path)
    if not has_item_clusters(manifest):
        return None
    section = manifest["item_clusters"]

    def array(fname: str, dtype: type, ndim: int) -> np.ndarray:
        return mapped_array(path / fname, dtype, ndim).view(np.ndarray)  # a plain array over the map: slicing it per click builds no memmap objects

    centres = array(CLUSTER_CENTRES, np.float32, 2)
    offsets = np.array(array(CLUSTER_OFFSETS, np.int64, 1))
    items = array(CLUSTER_ITEMS, np.int64, 1)
    vectors = array(CLUSTER_VECTORS, np.float32, 2)
    n_clusters = centres.shape[0]
    if offsets.shape != (n_clusters + 1,) or not 0 <= offsets[0] < n_items or offsets[-1] != n_items or np.any(np.diff(offsets) < 0):
        raise ArtifactError(f"{path / CLUSTER_OFFSETS}: not {n_clusters + 1} rising offsets from the head's end to {n_items}")
    if items.shape != (n_items,) or vectors.shape[0] != n_items or centres.shape[1] != vectors.shape[1] + 1:
        raise ArtifactError(
            f"{path}: cluster files do not fit {n_items} items (items {items.shape}, vectors {vectors.shape}, centres {centres.shape})"
        )
    stored_probe = section.get("probe")
    if not isinstance(stored_probe, int) or not 1 <= stored_probe <= n_clusters:
        raise ArtifactError(f"{path}: manifest item_clusters.probe must be a whole number from 1 to {n_clusters}, got {stored_probe!r}")
    if (section.get("clusters"), section.get("head")) != (n_clusters, int(offsets[0])):
        raise ArtifactError(
            f"{path}: manifest item_clusters says {section.get('clusters')!r} clusters and a head of {section.get('head')!r}, "
            f"the files {n_clusters} and {int(offsets[0])}"
        )
    fit = cluster_fit(manifest, n_items)
    if fit is None:  # cannot happen: has_item_clusters held above
        return None
    centres64 = centres.astype(np.float64)
    return ItemClusters(
        centres=np.ascontiguousarray(centres[:, :-1]),
        centre_half_norms=(0.5 * (centres64 * centres64).sum(axis=1)).astype(np.float32),
        offsets=offsets,
        items=items,
        vectors=vectors,
        probe=min(probe, n_clusters) if probe > 0 else stored_probe,
        fit=fit,
    )
