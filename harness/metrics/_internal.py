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


def silhouette_cosine(vectors: np.ndarray, clusters: np.ndarray, *, max_points: int = 5000, seed: int = 0) -> float:
    """Mean silhouette with cosine distance, on clustered points (noise left out), sampled to at most ``max_points``.

    NaN when fewer than 2 clusters remain.
    """
    from sklearn.metrics import silhouette_score

    (clusters,) = check_same_length(clusters, names=("clusters",))
    rows = _clustered_sample(clusters, max_points, seed)
    if np.unique(clusters[rows]).size < 2 or np.unique(clusters[rows]).size >= rows.size:
        return float("nan")
    return float(silhouette_score(vectors[rows], clusters[rows], metric="cosine"))


def density_validity(vectors: np.ndarray, clusters: np.ndarray, *, max_points: int = 5000, seed: int = 0) -> float:
    """DBCV (the hdbscan package's validity index) on the space that was clustered, noise included.

    Sampled to at most ``max_points`` (seeded): the index needs all pairwise distances
    within clusters. NaN when fewer than 2 clusters are present.
    """
    from hdbscan.validity import validity_index

    (clusters,) = check_same_length(clusters, names=("clusters",))
    rows = np.arange(clusters.size)
    if rows.size > max_points:
        rows = np.sort(np.random.default_rng(seed).choice(rows, size=max_points, replace=False))
    labels = clusters[rows]
    present, sizes = np.unique(labels[labels != NOISE], return_counts=True)
    if present.size < 2 or sizes.min() < 2:
        return float("nan")
    contiguous = np.where(labels == NOISE, NOISE, np.searchsorted(present, labels))  # the index expects ids 0..k-1
    with np.errstate(divide="ignore", invalid="ignore"):
        value = validity_index(np.asarray(vectors[rows], dtype=np.float64), contiguous)
    return float(value)
