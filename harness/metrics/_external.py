"""Agreement between clusters and gold labels, with HDBSCAN noise made explicit."""

from __future__ import annotations

import numpy as np
from sklearn import metrics as skm

from harness.metrics._checks import check_same_length

NOISE = -1


def adjusted_rand(labels_true: np.ndarray, labels_pred: np.ndarray) -> float:
    labels_true, labels_pred = check_same_length(labels_true, labels_pred, names=("labels_true", "labels_pred"))
    return float(skm.adjusted_rand_score(labels_true, labels_pred))


def adjusted_mutual_info(labels_true: np.ndarray, labels_pred: np.ndarray) -> float:
    labels_true, labels_pred = check_same_length(labels_true, labels_pred, names=("labels_true", "labels_pred"))
    return float(skm.adjusted_mutual_info_score(labels_true, labels_pred))


def normalized_mutual_info(labels_true: np.ndarray, labels_pred: np.ndarray) -> float:
    labels_true, labels_pred = check_same_length(labels_true, labels_pred, names=("labels_true", "labels_pred"))
    return float(skm.normalized_mutual_info_score(labels_true, labels_pred))


def homogeneity_completeness_v(labels_true: np.ndarray, labels_pred: np.ndarray) -> tuple[float, float, float]:
    labels_true, labels_pred = check_same_length(labels_true, labels_pred, names=("labels_true", "labels_pred"))
    h, c, v = skm.homogeneity_completeness_v_measure(labels_true, labels_pred)
    return float(h), float(c), float(v)


def external_scores(labels_true: np.ndarray, labels_pred: np.ndarray) -> dict[str, float]:
    """ARI, AMI, NMI, V-measure, homogeneity and completeness, keyed by metric name."""
    h, c, v = homogeneity_completeness_v(labels_true, labels_pred)
    return {
        "ari": adjusted_rand(labels_true, labels_pred),
        "ami": adjusted_mutual_info(labels_true, labels_pred),
        "nmi": normalized_mutual_info(labels_true, labels_pred),
        "v_measure": v,
        "homogeneity": h,
        "completeness": c,
    }


def cluster_shape(clusters: np.ndarray) -> dict[str, float]:
    """Number of clusters (noise excluded), noise share and its complement, coverage."""
    (clusters,) = check_same_length(clusters, names=("clusters",))
    noise = clusters == NOISE
    return {
        "n_clusters": float(np.unique(clusters[~noise]).size),
        "noise_fraction": float(noise.mean()),
        "coverage": float(1.0 - noise.mean()),
    }


def noise_aware_scores(labels_true: np.ndarray, clusters: np.ndarray) -> dict[str, float]:
    """External scores two ways: noise counted as one cluster (plain names) and on clustered points only (``_clustered``).

    When every point is noise, the clustered-only scores are NaN: there is nothing to score.
    """
    labels_true, clusters = check_same_length(labels_true, clusters, names=("labels_true", "clusters"))
    scores = external_scores(labels_true, clusters)
    kept = clusters != NOISE
    if kept.any():
        clustered = external_scores(labels_true[kept], clusters[kept])
    else:
        clustered = {name: float("nan") for name in scores}
    scores.update({f"{name}_clustered": value for name, value in clustered.items()})
    scores.update(cluster_shape(clusters))
    return scores
