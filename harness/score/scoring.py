"""All scores of one clustering, from arrays only."""

from __future__ import annotations

import numpy as np

from harness.metrics import (
    cluster_shape,
    cluster_size_entropy,
    density_validity,
    density_validity_undefined,
    length_eta2_pvalue,
    length_scores,
    noise_aware_scores,
    silhouette_cosine,
)
from harness.score.describe import TermCounts, cluster_descriptions


def trial_scores(clusters: np.ndarray, token_counts: np.ndarray, labels: np.ndarray | None) -> dict[str, float]:
    """External scores (when labelled), cluster shape and length measures of one clustering.

    Token counts are floored at 1 so that a text the tokenizer reduces to nothing
    still has a finite log length.
    """
    lengths = np.maximum(np.asarray(token_counts), 1)
    scores = noise_aware_scores(labels, clusters) if labels is not None else cluster_shape(clusters)
    scores.update(length_scores(lengths, clusters, labels))
    return scores


# Label-free scores computed on vectors: silhouette on the trial's own pooled vectors, DBCV on the clustered space.
# Each is a function of (vectors, labels, max_points) and, only where the points are subsampled, of the seed;
# the executor computes each once per distinct labelling of the same vectors (StageExecutor.label_free_score).
VECTOR_SCORES = {"silhouette": silhouette_cosine, "dbcv": density_validity}
# Enters the key of every cached vector score with the harness version: raise it when how silhouette or DBCV
# is computed changes, so that no score computed by the former code is read back from the cache.
VECTOR_SCORES_VERSION = 3  # 2: the silhouette in float64; 3: its cluster sums by a matrix product


def subsampled_points(score: str, clusters: np.ndarray) -> int:
    """How many points a vector score samples ``max_points`` from: the clustered ones for the silhouette, all for
    DBCV (see harness.metrics._internal)."""
    return int((clusters != -1).sum()) if score == "silhouette" else int(clusters.size)


def label_free_scores(clusters: np.ndarray, token_counts: np.ndarray, vector_scores: dict[str, float], *,
                      seed: int, permutations: int) -> dict[str, float]:
    """Scores that need no labels: the vector scores given (silhouette, DBCV), size entropy, and the permutation
    p-value of eta^2(log length | cluster)."""
    lengths = np.maximum(np.asarray(token_counts), 1)
    return {
        **vector_scores,
        "cluster_size_entropy": cluster_size_entropy(clusters),
        "length_eta2_pvalue": length_eta2_pvalue(lengths, clusters, permutations=permutations, seed=seed),
    }


def label_free_notes(scores: dict[str, float], clusters: np.ndarray, reduced: np.ndarray, *, seed: int,
                     max_points: int) -> dict[str, str]:
    """Tags saying why a label-free score is NaN (``harness.nan_reason.<score>``), for the seed run."""
    notes = {}
    if np.isnan(scores.get("dbcv", 0.0)):
        reason = density_validity_undefined(reduced, clusters, max_points=max_points, seed=seed)
        notes["harness.nan_reason.dbcv"] = reason or "the hdbscan package's validity_index gave no value"
    return notes


def described_clusters(terms: TermCounts, clusters: np.ndarray, token_counts: np.ndarray, *, top: int) -> tuple[list[dict], float]:
    """The cluster description table and its mean NPMI coherence (NaN without clusters)."""
    table = cluster_descriptions(terms, clusters, token_counts, top=top)
    coherences = [row["npmi"] for row in table if not np.isnan(row["npmi"])]
    return table, float(np.mean(coherences)) if coherences else float("nan")
