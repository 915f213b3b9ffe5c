"""Scores that need no gold labels: cluster shape and separation."""

from __future__ import annotations

import numpy as np

from harness.metrics._checks import check_same_length

NOISE = -1


def cluster_size_entropy(clusters: np.ndarray) -> float:
    """Entropy of the cluster sizes (noise left out) over its maximum, log k: 1 for equal sizes, near 0 for one dominant cluster."""
    (clusters,) = check_same_length(clusters, names=("clusters",))
    sizes = np.unique(clusters[clusters != NOISE], return_counts=True)[1]
    if sizes.size < 2:
        return 0.0
    p = sizes / sizes.sum()
    return float(-(p * np.log(p)).sum() / np.log(sizes.size))


def _clustered_sample(clusters: np.ndarray, max_points: int, seed: int) -> np.ndarray:
    kept = np.flatnonzero(clusters != NOISE)
    if kept.size > max_points:
        kept = np.sort(np.random.default_rng(seed).choice(kept, size=max_points, replace=False))
    return kept


# Up to this many texts, the silhouette of a labelling takes its points' block of the cosine distances of all the
# vectors (8 bytes each: 128 MB at 4,000), which the executor keeps for every labelling of the same vectors and a
# cluster worker computes per trial: the same arithmetic in both places. Above, each computes its own points'.
DISTANCES_KEPT_UP_TO = 4000


def cosine_distances(vectors: np.ndarray) -> np.ndarray:
    """All pairwise cosine distances of ``vectors`` in float64 (scikit-learn's pairwise_distances).

    In float64: float32 distances round differently with the BLAS threads (a Dask worker has one), which moved a
    silhouette near 0 by 5e-4 of itself between a worker and this process.
    """
    from sklearn.metrics import pairwise_distances

    return pairwise_distances(np.asarray(vectors, dtype=np.float64), metric="cosine")


def silhouette_from_distances(distances: np.ndarray, labels: np.ndarray) -> float:
    """Mean silhouette (Rousseeuw 1987) from a square distance matrix, every point's distances to each cluster
    summed by one matrix product. As scikit-learn's silhouette_samples: a point alone in its cluster scores 0."""
    _, codes = np.unique(labels, return_inverse=True)
    sizes = np.bincount(codes).astype(np.float64)
    points = np.arange(codes.size)
    membership = np.zeros((codes.size, sizes.size))
    membership[points, codes] = 1.0
    totals = distances @ membership  # (points, clusters): each point's summed distance to each cluster
    with np.errstate(divide="ignore", invalid="ignore"):
        own = totals[points, codes] / (sizes[codes] - 1)
        means = totals / sizes
        means[points, codes] = np.inf
        nearest = means.min(axis=1)
        samples = (nearest - own) / np.maximum(own, nearest)
    return float(np.nan_to_num(samples).mean())


def silhouette_cosine(vectors: np.ndarray, clusters: np.ndarray, *, max_points: int = 5000, seed: int = 0,
                      distances: np.ndarray | None = None) -> float:
    """Mean silhouette with cosine distance, on clustered points (noise left out), sampled to at most ``max_points``.

    ``distances``: the cosine distances of all of ``vectors`` (``cosine_distances``), where the caller holds them
    for several labellings of the same vectors; the clustered points' block is taken from it.
    NaN when fewer than 2 clusters remain.
    """
    (clusters,) = check_same_length(clusters, names=("clusters",))
    rows = _clustered_sample(clusters, max_points, seed)
    if np.unique(clusters[rows]).size < 2 or np.unique(clusters[rows]).size >= rows.size:
        return float("nan")
    if distances is None:
        block = cosine_distances(vectors[rows])
    elif rows.size == distances.shape[0]:  # every point clustered: the block is the whole matrix, not a copy of it
        block = distances
    else:
        block = distances[np.ix_(rows, rows)]
    return silhouette_from_distances(block, clusters[rows])


def _dbcv_sample(clusters: np.ndarray, max_points: int, seed: int) -> np.ndarray:
    """The rows DBCV is computed on: all of them, or a seeded sample of ``max_points``."""
    rows = np.arange(clusters.size)
    if rows.size > max_points:
        rows = np.sort(np.random.default_rng(seed).choice(rows, size=max_points, replace=False))
    return rows


def density_validity_undefined(vectors: np.ndarray, clusters: np.ndarray, *, max_points: int = 5000,
                               seed: int = 0) -> str:
    """Why DBCV has no value on this clustering ('' when it has one as far as can be told before computing it).

    Identical clustered points leave it undefined: the all-points core distance averages inverse powers of the
    distances to the other points of the cluster (Moulavi et al. 2014, Density-Based Clustering Validation, SDM,
    definition 1), infinite at distance 0, and two identical points in different clusters separate them by 0.
    scikit-learn's proposed DBCV refuses identical points for this reason (scikit-learn pull request 28244); the
    hdbscan package skips zero distances, and on high-dimensional data its spanning-tree check then fails with an
    AssertionError, because the rounding of the distances of duplicates differs by direction.
    """
    (clusters,) = check_same_length(clusters, names=("clusters",))
    labels = clusters[_dbcv_sample(clusters, max_points, seed)]
    present, sizes = np.unique(labels[labels != NOISE], return_counts=True)
    if present.size < 2:
        return "fewer than 2 clusters"
    if sizes.min() < 2:
        return "a cluster of a single point"
    clustered = np.asarray(vectors)[_dbcv_sample(clusters, max_points, seed)][labels != NOISE]
    distinct = np.unique(clustered, axis=0).shape[0]
    if distinct < clustered.shape[0]:
        return (f"{clustered.shape[0] - distinct} clustered points repeat another's vector exactly; DBCV is undefined "
                "for identical points (zero distance in the all-points core distance)")
    return ""


def density_validity(vectors: np.ndarray, clusters: np.ndarray, *, max_points: int = 5000, seed: int = 0) -> float:
    """DBCV (the hdbscan package's validity index, computed by ``_dbcv``) on the space that was clustered, noise included.

    Sampled to at most ``max_points`` (seeded): the index needs all pairwise distances
    within clusters. NaN when fewer than 2 clusters are present, when a cluster has one point, when clustered
    points are identical (``density_validity_undefined`` says which), and when the hdbscan package's own check
    fails (an AssertionError in its spanning tree, seen on near-identical points).
    """
    from harness.metrics._dbcv import SpanningTreeAmbiguous, validity_index

    (clusters,) = check_same_length(clusters, names=("clusters",))
    if density_validity_undefined(vectors, clusters, max_points=max_points, seed=seed):
        return float("nan")
    rows = _dbcv_sample(clusters, max_points, seed)
    labels = clusters[rows]
    present = np.unique(labels[labels != NOISE])
    contiguous = np.where(labels == NOISE, NOISE, np.searchsorted(present, labels))  # the index expects ids 0..k-1
    try:
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            value = validity_index(np.asarray(vectors[rows], dtype=np.float64), contiguous)
    except SpanningTreeAmbiguous:
        return float("nan")
    return float(value)
