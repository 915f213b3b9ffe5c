"""How much text length explains a grouping."""

from __future__ import annotations

import numpy as np
import pandas as pd

from harness.metrics._checks import check_positive, check_same_length


def length_eta_squared(lengths: np.ndarray, groups: np.ndarray) -> float:
    """Share of the variance of log length explained by group membership (correlation ratio, squared)."""
    lengths, groups = check_same_length(lengths, groups, names=("lengths", "groups"))
    log_len = np.log(check_positive(lengths, "lengths"))
    total = ((log_len - log_len.mean()) ** 2).sum()
    if total == 0.0:
        return 0.0
    means = pd.Series(log_len).groupby(groups).transform("mean").to_numpy()
    return float(((means - log_len.mean()) ** 2).sum() / total)


def length_confound_index(lengths: np.ndarray, clusters: np.ndarray, labels: np.ndarray) -> float:
    """How far clusters separate texts by length beyond what the topics themselves do.

    max(0, eta2(L|clusters) - eta2(L|labels)) / (1 - eta2(L|labels)), with L = log length
    and noise as its own group: 0 when clusters hold no more length information than the
    labels, 1 when they split texts by length beyond topic.
    """
    lengths, clusters, labels = check_same_length(lengths, clusters, labels, names=("lengths", "clusters", "labels"))
    by_clusters = length_eta_squared(lengths, clusters)
    by_labels = length_eta_squared(lengths, labels)
    if by_labels >= 1.0:
        return 0.0
    return float(max(0.0, by_clusters - by_labels) / (1.0 - by_labels))


def length_scores(lengths: np.ndarray, clusters: np.ndarray, labels: np.ndarray | None) -> dict[str, float]:
    """The length measures of one clustering; without labels, eta2 of the clusters only."""
    scores = {"length_eta2_clusters": length_eta_squared(lengths, clusters)}
    if labels is not None:
        scores["length_eta2_labels"] = length_eta_squared(lengths, labels)
        scores["length_confound_index"] = length_confound_index(lengths, clusters, labels)
    return scores
