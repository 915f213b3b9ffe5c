"""Agreement between clusters and gold labels, with HDBSCAN noise made explicit."""

from __future__ import annotations

import numpy as np
from sklearn import metrics as skm

from harness.metrics._checks import check_finite_labels, check_same_length
from harness.metrics._contingency import PairCodes, scores_from_tables

NOISE = -1


def adjusted_rand(labels_true: np.ndarray, labels_pred: np.ndarray) -> float:
    labels_true, labels_pred = check_same_length(labels_true, labels_pred, names=("labels_true", "labels_pred"))
    return float(skm.adjusted_rand_score(labels_true, labels_pred))


EXTERNAL = ("ari", "ami", "nmi", "v_measure", "homogeneity", "completeness")


def external_scores(labels_true: np.ndarray, labels_pred: np.ndarray) -> dict[str, float]:
    """ARI, AMI, NMI, V-measure, homogeneity and completeness, keyed by metric name.

    From one contingency table with scikit-learn's formulas (harness/metrics/_contingency.py), instead of four
    scikit-learn calls that each build the table again; tests/test_metrics.py checks equality with scikit-learn's
    functions to 1e-12 on every case it enumerates (with thousands of clusters AMI can differ by about 1e-11, from
    the expected mutual information summed differently; a 40-digit computation put this one the closer).
    """
    labels_true, labels_pred = check_same_length(labels_true, labels_pred, names=("labels_true", "labels_pred"))
    check_finite_labels(labels_true, labels_pred, names=("labels_true", "labels_pred"))
    scores = scores_from_tables(PairCodes(labels_true, labels_pred).table()[None])
    return {name: float(scores[name][0]) for name in EXTERNAL}


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
    check_finite_labels(labels_true, clusters, names=("labels_true", "clusters"))
    codes = PairCodes(labels_true, clusters)
    table = codes.table()
    kept = clusters != NOISE
    # The clustered points' table is the whole table without the noise column; a gold label that only noise
    # points carry leaves an empty row, which the scores ignore as scikit-learn ignores labels that do not occur.
    noise_column = np.flatnonzero(codes.cluster_values == NOISE)
    clustered_table = table.copy()
    clustered_table[:, noise_column] = 0.0
    both = scores_from_tables(np.stack([table, clustered_table]))
    scores = {name: float(both[name][0]) for name in EXTERNAL}
    if kept.any():
        scores.update({f"{name}_clustered": float(both[name][1]) for name in EXTERNAL})
    else:
        scores.update({f"{name}_clustered": float("nan") for name in EXTERNAL})
    scores.update(cluster_shape(clusters))
    return scores
