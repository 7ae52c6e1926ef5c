"""The clustered item index's builder: k-means, the sphere mapping, the exact top-k and the probe choice.

References: scikit-learn's KMeans (Lloyd's algorithm) from the same starting centres; the exact
top-k is `numpy.argpartition` over all scores; the inner-product-to-distance mapping is
Bachrach et al., "Speeding up the Xbox recommender system using a Euclidean transformation for
inner-product spaces", RecSys 2014 (argmax_j q . x_j = argmin_j |q' - x'_j| with
x' = [x, sqrt(M^2 - |x|^2)], q' = [q, 0]).
"""

from __future__ import annotations

import numpy as np
from sklearn.cluster import KMeans

from offline.export.item_clusters import (
    ITERATIONS,
    choose_probe,
    cluster_count,
    exact_top,
    item_cluster_files,
    kmeans,
    mapped,
    nearest,
)
from service.artifacts.item_clusters import AUTO_CLUSTERED_MAX_SHARE, CLUSTER_CENTRES, CLUSTER_ITEMS, CLUSTER_OFFSETS, CLUSTER_VECTORS, ClusterFit


def blobs(n: int, d: int, groups: int, seed: int, spread: float = 0.15) -> tuple[np.ndarray, np.ndarray]:
    """Items around `groups` directions, like a trained model's categories: vectors [n, d], bias [n]."""
    rng = np.random.default_rng(seed)
    centres = rng.normal(0, 1, (groups, d))
    which = rng.integers(0, groups, n)
    vectors = (centres[which] + spread * rng.normal(0, 1, (n, d))).astype(np.float32)
    return vectors, rng.normal(0, 0.1, n).astype(np.float32)


def test_kmeans_matches_scikit_learn_lloyd_from_the_same_start() -> None:
    points, _ = blobs(3000, 8, 12, seed=1)
    init = points[np.random.default_rng(2).choice(len(points), 12, replace=False)]
    ours = kmeans(points, 12, np.random.default_rng(0), init=init)
    ref = KMeans(12, init=init, n_init=1, max_iter=ITERATIONS, tol=0.0, algorithm="lloyd").fit(points.astype(np.float64))
    np.testing.assert_allclose(ours, ref.cluster_centers_, atol=1e-4)
    np.testing.assert_array_equal(nearest(points, ours), ref.predict(points.astype(np.float64)))


def test_the_sphere_mapping_turns_largest_inner_product_into_nearest_point() -> None:
    vectors, bias = blobs(2000, 6, 5, seed=3, spread=0.8)
    q = np.random.default_rng(4).normal(0, 1, (50, 6)).astype(np.float32)
    x = mapped(vectors, bias, max_norm=float(np.sqrt((vectors.astype(np.float64) ** 2).sum(1) + bias.astype(np.float64) ** 2).max()))
    assert np.allclose(np.linalg.norm(x.astype(np.float64), axis=1), np.linalg.norm(x[0].astype(np.float64)), rtol=1e-5)  # one sphere
    q_mapped = np.concatenate([q, np.ones((50, 1)), np.zeros((50, 1))], axis=1)
    by_product = np.argmax(q.astype(np.float64) @ vectors.T.astype(np.float64) + bias, axis=1)
    by_distance = np.argmin(((q_mapped[:, None, :] - x[None].astype(np.float64)) ** 2).sum(-1), axis=1)
    np.testing.assert_array_equal(by_product, by_distance)


def test_exact_top_is_argpartition_over_all_scores_in_slices() -> None:
    vectors, bias = blobs(150_000, 4, 7, seed=5)  # more than one 65,536-item slice
    f = np.random.default_rng(6).normal(0, 1, (9, 4)).astype(np.float32)
    got = exact_top(f, vectors, bias, k=20)
    scores = f @ vectors.T + bias
    want = np.argpartition(-scores, 19, axis=1)[:, :20]
    for g, w, s in zip(got, want, scores):
        assert set(g) == set(w) or np.allclose(np.sort(s[g]), np.sort(s[w]))  # equal up to ties


def test_probe_choice_equals_the_overlap_a_search_would_find() -> None:
    # The builder claims: overlap at P probes = exact top-20 items in the head or in a cluster
    # ranked below P. Check it against a direct search of the head and the probed clusters.
    vectors, bias = blobs(6000, 8, 20, seed=7)
    rng = np.random.default_rng(8)
    features = (vectors[rng.integers(0, 6000, 40)] + rng.normal(0, 0.3, (40, 8))).astype(np.float32)
    files, section = item_cluster_files(vectors, bias, features)
    centres, order, offsets = files[CLUSTER_CENTRES], files[CLUSTER_ITEMS], files[CLUSTER_OFFSETS]
    head = int(offsets[0])
    assert head == 120 and section["head"] == 120  # 2% of the items
    cluster_of = np.full(len(vectors), -1, dtype=np.int64)  # -1: the head
    cluster_of[order[head:]] = np.repeat(np.arange(len(offsets) - 1), np.diff(offsets))
    norms = np.sqrt((vectors.astype(np.float64) ** 2).sum(1) + bias.astype(np.float64) ** 2)
    assert norms[order[:head]].min() >= norms[order[head:]].max()  # the head: the largest vectors
    top = exact_top(features, vectors, bias)
    _, _, by_probe = choose_probe(features, centres, cluster_of[top], 0.99)
    q = np.concatenate([features, np.ones((40, 1), np.float32)], axis=1)
    key = q @ centres[:, :-1].T - 0.5 * (centres.astype(np.float64) ** 2).sum(1)
    for probe in (1, 2, 5, section["probe"]):
        found = []
        for row in range(40):
            probed = np.argsort(-key[row], kind="stable")[:probe]
            members = np.flatnonzero(np.isin(cluster_of, probed) | (cluster_of < 0))
            s = vectors[members] @ features[row] + bias[members]
            approx = members[np.argsort(-s)[:20]]
            found.append(len(set(approx) & set(top[row])) / 20)
        assert abs(np.mean(found) - by_probe[probe - 1]) < 1e-9, probe
    assert section["agreement_top20"] >= 0.99 and section["probe"] < section["clusters"] / 2  # structure: few clusters suffice
    # The cluster-ordered rows are the items' [v, b], each cluster one contiguous block.
    rows = np.concatenate(list(files[CLUSTER_VECTORS].blocks()))  # made block by block when the artifact writes it
    np.testing.assert_array_equal(rows[:, :-1], vectors[order])
    np.testing.assert_array_equal(rows[:, -1], bias[order])
    assert offsets[-1] == len(vectors) and np.all(np.diff(offsets) >= 0) and sorted(order.tolist()) == list(range(len(vectors)))


def test_cluster_count_is_about_the_square_root() -> None:
    assert cluster_count(1_000_000) == 1024 and cluster_count(200_000) == 512 and cluster_count(100) == 16


def test_an_automatic_build_calibrates_first_and_skips_an_index_auto_would_not_serve() -> None:
    # Structured vectors (like a trained model's): the calibration on the exact top items alone
    # gives the probe count and agreement that the full build measures, and the index is built.
    vectors, bias = blobs(6000, 8, 20, seed=7)
    rng = np.random.default_rng(8)
    features = (vectors[rng.integers(0, 6000, 40)] + rng.normal(0, 0.3, (40, 8))).astype(np.float32)
    full_files, full = item_cluster_files(vectors, bias, features)
    files, section = item_cluster_files(vectors, bias, features, only_if_served=True)
    assert files is not None and set(files) == set(full_files)
    assert (section["probe"], section["agreement_top20"]) == (full["probe"], full["agreement_top20"])
    fit = ClusterFit.of(6000, section["clusters"], section["head"], section["probe"], section["agreement_top20"])
    assert fit.served_by_auto
    # Random vectors (random weights): nothing to cluster, most clusters must be probed, so no index;
    # the skipped section says what the full build would have needed, and the same figures.
    vectors = rng.normal(0, 1, (6000, 8)).astype(np.float32)
    features = rng.normal(0, 1, (40, 8)).astype(np.float32)
    _, full = item_cluster_files(vectors, bias, features)
    files, skipped = item_cluster_files(vectors, bias, features, only_if_served=True)
    assert files is None
    assert (skipped["probe_needed"], skipped["agreement_top20"]) == (full["probe"], full["agreement_top20"])
    by_hand = (skipped["head"] + skipped["probe_needed"] * (6000 - skipped["head"]) / skipped["clusters"]) / 6000
    assert skipped["read_share"] == round(by_hand, 4) > AUTO_CLUSTERED_MAX_SHARE
    assert f"{skipped['probe_needed']} of {skipped['clusters']} clusters" in skipped["reason"]
