"""Scores of a clustering: pure functions of arrays, each returning a float or a dict of floats."""

from harness.metrics._external import (
    NOISE,
    adjusted_rand,
    cluster_shape,
    external_scores,
    noise_aware_scores,
)
from harness.metrics._contingency import PairCodes, scores_from_table, scores_from_tables, self_pair_counts
from harness.metrics._expected_mi import expected_mutual_info
from harness.metrics._internal import (
    cluster_size_entropy,
    density_validity,
    density_validity_undefined,
    silhouette_cosine,
)
from harness.metrics._length import (
    length_confound_index,
    length_epsilon_squared,
    length_eta2_pvalue,
    length_eta_squared,
    length_leakage_r2,
    length_scores,
)

__all__ = sorted(
    [
        "NOISE",
        "PairCodes",
        "cluster_size_entropy",
        "density_validity",
        "density_validity_undefined",
        "length_eta2_pvalue",
        "length_leakage_r2",
        "scores_from_table",
        "scores_from_tables",
        "self_pair_counts",
        "expected_mutual_info",
        "silhouette_cosine",
        "adjusted_rand",
        "cluster_shape",
        "external_scores",
        "length_confound_index",
        "length_epsilon_squared",
        "length_eta_squared",
        "length_scores",
        "noise_aware_scores",
    ]
)
