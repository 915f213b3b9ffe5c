"""All scores of one clustering, from arrays only."""

from __future__ import annotations

import numpy as np

from harness.metrics import cluster_shape, length_scores, noise_aware_scores


def trial_scores(clusters: np.ndarray, token_counts: np.ndarray, labels: np.ndarray | None) -> dict[str, float]:
    """External scores (when labelled), cluster shape and length measures of one clustering.

    Token counts are floored at 1 so that a text the tokenizer reduces to nothing
    still has a finite log length.
    """
    lengths = np.maximum(np.asarray(token_counts), 1)
    scores = noise_aware_scores(labels, clusters) if labels is not None else cluster_shape(clusters)
    scores.update(length_scores(lengths, clusters, labels))
    return scores
