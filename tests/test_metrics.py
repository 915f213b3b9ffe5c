"""Scores against their reference implementations and formulas."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from sklearn import metrics as skm

from harness.metrics import (
    cluster_shape,
    external_scores,
    length_confound_index,
    length_eta_squared,
    noise_aware_scores,
)
from harness.scoring import trial_scores

RNG = np.random.default_rng(7)
LABELS = RNG.integers(0, 4, 300)
CLUSTERS = np.where(RNG.random(300) < 0.7, LABELS, RNG.integers(-1, 5, 300))


def test_external_scores_equal_scikit_learn():
    # Reference: sklearn.metrics (adjusted_rand_score, adjusted_mutual_info_score, normalized_mutual_info_score,
    # homogeneity_completeness_v_measure).
    ours = external_scores(LABELS, CLUSTERS)
    assert ours["ari"] == skm.adjusted_rand_score(LABELS, CLUSTERS)
    assert ours["ami"] == skm.adjusted_mutual_info_score(LABELS, CLUSTERS)
    assert ours["nmi"] == skm.normalized_mutual_info_score(LABELS, CLUSTERS)
    h, c, v = skm.homogeneity_completeness_v_measure(LABELS, CLUSTERS)
    assert (ours["homogeneity"], ours["completeness"], ours["v_measure"]) == (h, c, v)


def test_noise_counted_as_one_cluster_and_left_out():
    # Reference: scikit-learn's ARI on all points (noise label -1 is just another cluster id) and on clustered points.
    scores = noise_aware_scores(LABELS, CLUSTERS)
    kept = CLUSTERS != -1
    assert scores["ari"] == skm.adjusted_rand_score(LABELS, CLUSTERS)
    assert scores["ari_clustered"] == skm.adjusted_rand_score(LABELS[kept], CLUSTERS[kept])
    assert scores["coverage"] == pytest.approx(kept.mean())
    assert scores["noise_fraction"] == pytest.approx(1 - kept.mean())
    assert scores["n_clusters"] == np.unique(CLUSTERS[kept]).size


def test_all_noise_leaves_clustered_scores_undefined():
    scores = noise_aware_scores(LABELS, np.full(300, -1))
    assert np.isnan(scores["ari_clustered"]) and scores["coverage"] == 0.0 and scores["n_clusters"] == 0


def test_eta_squared_equals_one_way_anova():
    # Reference: scipy.stats.f_oneway. For k groups and N points, eta^2 = F(k-1) / (F(k-1) + N - k)
    # (the textbook relation between the F statistic and the correlation ratio).
    lengths = RNG.integers(3, 80, 300)
    groups = RNG.integers(0, 5, 300) + (lengths > 40)
    log_len = np.log(lengths)
    f = stats.f_oneway(*[log_len[groups == g] for g in np.unique(groups)]).statistic
    k, n = np.unique(groups).size, lengths.size
    assert length_eta_squared(lengths, groups) == pytest.approx(f * (k - 1) / (f * (k - 1) + n - k), rel=1e-10)


def test_length_index_clusters_are_length_bins_gives_near_one():
    # Constructed case: topics independent of length; clusters are length deciles. k equal-share bins of a
    # uniform variable explain 1 - 1/k^2 of its variance (0.99 for k = 10), so "near 1" here means > 0.95.
    lengths = RNG.integers(3, 61, 2000)
    labels = RNG.integers(0, 6, 2000)
    clusters = np.digitize(np.log(lengths), np.quantile(np.log(lengths), np.linspace(0.1, 0.9, 9)))
    assert length_confound_index(lengths, clusters, labels) > 0.95


def test_length_index_clusters_independent_of_length_gives_near_zero():
    lengths = RNG.integers(3, 61, 2000)
    labels = RNG.integers(0, 6, 2000)
    clusters = RNG.integers(0, 6, 2000)
    assert length_confound_index(lengths, clusters, labels) < 0.01


def test_length_index_clusters_equal_labels_is_exactly_zero():
    lengths = RNG.integers(3, 61, 500)
    labels = (lengths > 30).astype(int) + RNG.integers(0, 2, 500) * 2  # labels themselves tied to length
    assert length_confound_index(lengths, labels, labels) == 0.0


def test_length_index_discounts_the_labels_own_length_signal():
    # The index is (eta2_c - eta2_y) / (1 - eta2_y): written out here from its definition.
    lengths = RNG.integers(3, 61, 1000)
    labels = (lengths > 30).astype(int)
    clusters = np.digitize(lengths, [15, 30, 45])
    e_c, e_y = length_eta_squared(lengths, clusters), length_eta_squared(lengths, labels)
    assert length_confound_index(lengths, clusters, labels) == pytest.approx((e_c - e_y) / (1 - e_y))


def test_unlabelled_scores_have_no_external_metrics():
    scores = trial_scores(CLUSTERS, RNG.integers(1, 50, 300), None)
    assert "ari" not in scores and "length_confound_index" not in scores
    assert {"length_eta2_clusters", "coverage", "n_clusters"} <= scores.keys()


@pytest.mark.parametrize(
    "call, message",
    [
        (lambda: external_scores(np.array([0, 1]), np.array([0, 1, 2])), "must have one length"),
        (lambda: length_eta_squared(np.array([1, 0, 3]), np.array([0, 1, 1])), "'lengths' parameter must be > 0"),
        (lambda: cluster_shape(np.zeros((2, 2))), "'clusters' parameter must be 1-D"),
    ],
)
def test_metric_errors_name_the_parameter(call, message):
    with pytest.raises(ValueError, match=message):
        call()


labelings = st.integers(min_value=5, max_value=60).flatmap(
    lambda n: st.tuples(
        st.lists(st.integers(0, 3), min_size=n, max_size=n),
        st.lists(st.integers(-1, 4), min_size=n, max_size=n),
        st.lists(st.integers(1, 200), min_size=n, max_size=n),
        st.permutations(list(range(-1, 5))),
    )
)


@settings(max_examples=60, deadline=None)
@given(labelings)
def test_renaming_cluster_ids_changes_no_score(case):
    # Property: every external and length score depends on the partition, not on the ids given to its parts.
    labels, clusters, lengths, permutation = (np.array(x) for x in case)
    renamed = np.array([permutation[c + 1] for c in clusters])
    noise_kept = np.where(clusters == -1, -1, renamed + 10)  # keep noise as noise, rename the rest
    before = trial_scores(clusters, lengths, labels)
    after = trial_scores(noise_kept, lengths, labels)
    for name, value in before.items():
        assert after[name] == pytest.approx(value, abs=1e-9, nan_ok=True), name
