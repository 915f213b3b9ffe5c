"""Scores against their reference implementations and formulas."""

from __future__ import annotations

import math

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
    length_epsilon_squared,
    length_eta_squared,
    noise_aware_scores,
)
from harness.score.scoring import trial_scores

RNG = np.random.default_rng(7)
LABELS = RNG.integers(0, 4, 300)
CLUSTERS = np.where(RNG.random(300) < 0.7, LABELS, RNG.integers(-1, 5, 300))


def _scikit_learn_external(labels_true, labels_pred) -> dict[str, float]:
    """Reference: sklearn.metrics' adjusted_rand_score, adjusted_mutual_info_score, normalized_mutual_info_score and
    homogeneity_completeness_v_measure, each on the label arrays."""
    h, c, v = skm.homogeneity_completeness_v_measure(labels_true, labels_pred)
    return {"ari": skm.adjusted_rand_score(labels_true, labels_pred),
            "ami": skm.adjusted_mutual_info_score(labels_true, labels_pred),
            "nmi": skm.normalized_mutual_info_score(labels_true, labels_pred),
            "v_measure": v, "homogeneity": h, "completeness": c}


def _external_cases():
    """Label arrays covering the shapes a clustering takes: noise or none, all noise, one cluster, one gold class,
    gold classes carried by noise points only, singletons, every point its own cluster, two points, string gold
    labels, cluster ids with gaps, and larger corpora with many clusters."""
    rng = np.random.default_rng(11)
    labels = rng.integers(0, 4, 300)
    yield "noise", LABELS, CLUSTERS
    yield "no_noise", labels, np.where(rng.random(300) < 0.7, labels, rng.integers(0, 5, 300))
    yield "all_noise", labels, np.full(300, -1)
    yield "one_cluster", labels, np.zeros(300, dtype=int)
    yield "one_cluster_and_noise", labels, np.where(rng.random(300) < 0.5, 0, -1)
    yield "one_class", np.zeros(300, dtype=int), rng.integers(-1, 5, 300)
    only_noise = labels.copy()
    only_noise[:20] = 9  # gold class 9 carried by noise points only
    yield "class_only_in_noise", only_noise, np.where(np.arange(300) < 20, -1, rng.integers(0, 4, 300))
    yield "singletons", labels, np.where(rng.random(300) < 0.9, labels, 100 + np.arange(300))
    yield "own_cluster_each", labels, np.arange(300)
    yield "two_points", np.array([0, 1]), np.array([0, 0])
    yield "two_points_apart", np.array([0, 1]), np.array([0, 1])
    yield "string_labels", np.array(["sport", "world", "tech"])[labels % 3], rng.integers(-1, 6, 300)
    yield "gaps_in_ids", labels, np.array([-1, 3, 17, 400])[rng.integers(0, 4, 300)]
    yield "perfect_with_noise", labels, np.where(rng.random(300) < 0.8, labels, -1)
    for n, classes, clusters in ((2000, 6, 9), (5000, 20, 60), (1200, 2, 40)):
        gold = rng.integers(0, classes, n)
        yield f"n{n}_k{clusters}", gold, np.where(rng.random(n) < 0.5, gold, rng.integers(-1, clusters, n))


@pytest.mark.parametrize("name, labels, clusters", list(_external_cases()), ids=[c[0] for c in _external_cases()])
def test_external_scores_equal_scikit_learn_on_every_case(name, labels, clusters):
    # Reference: scikit-learn's four functions (_scikit_learn_external) on all points, noise (-1) as one more
    # cluster id, and on the clustered points only; the tool computes both from one contingency table.
    # 1e-12: the same formulas with other arithmetic (AMI's expected mutual information summed differently,
    # harness/metrics/_expected_mi.py); measured differences are below 1e-13.
    ours = external_scores(labels, clusters)
    for score, value in _scikit_learn_external(labels, clusters).items():
        assert ours[score] == pytest.approx(value, rel=0, abs=1e-12), score
    aware = noise_aware_scores(labels, clusters)
    for score, value in _scikit_learn_external(labels, clusters).items():
        assert aware[score] == pytest.approx(value, rel=0, abs=1e-12), score
    kept = clusters != -1
    for score, value in (_scikit_learn_external(labels[kept], clusters[kept]) if kept.any() else {}).items():
        assert aware[f"{score}_clustered"] == pytest.approx(value, rel=0, abs=1e-12), score
    if not kept.any():
        assert all(np.isnan(aware[f"{score}_clustered"]) for score in ("ari", "ami", "nmi", "v_measure"))


@pytest.mark.parametrize("bad", [np.nan, np.inf])
def test_non_finite_labels_are_refused_as_scikit_learn_refuses_them(bad):
    # Reference: scikit-learn's adjusted_rand_score raises ValueError on NaN input; counting NaN as a class is wrong.
    labels = LABELS.astype(float)
    labels[3] = bad
    with pytest.raises(ValueError):
        skm.adjusted_rand_score(labels, CLUSTERS)
    as_objects = LABELS.astype(object)
    as_objects[7] = bad  # a Python float among Python ints, as a table read without a dtype gives
    if np.isnan(bad):  # scikit-learn refuses NaN among objects; an infinite label is refused here all the same
        with pytest.raises(ValueError):
            skm.adjusted_rand_score(as_objects, CLUSTERS)
    for compute in (external_scores, noise_aware_scores):
        with pytest.raises(ValueError, match="must not contain NaN or infinity"):
            compute(labels, CLUSTERS)
        with pytest.raises(ValueError, match="must not contain NaN or infinity"):
            compute(LABELS, np.where(np.arange(300) == 5, bad, CLUSTERS.astype(float)))
        with pytest.raises(ValueError, match="must not contain NaN or infinity"):
            compute(as_objects, CLUSTERS)
        with pytest.raises(ValueError, match="complex"):
            compute(LABELS.astype(complex), CLUSTERS)
    # Object labels without a NaN are scored as scikit-learn scores them.
    words = np.array(["a", "b", "c", "d"], dtype=object)[LABELS]
    assert external_scores(words, CLUSTERS)["ari"] == pytest.approx(skm.adjusted_rand_score(words, CLUSTERS), abs=1e-12)


def test_thousands_of_clusters_agree_with_scikit_learn_to_1e_11():
    # Reference: scikit-learn's functions; 1e-11 for AMI (see external_scores), 1e-12 for the rest.
    rng = np.random.default_rng(5)
    labels = rng.integers(0, 50, 20000)
    clusters = np.where(rng.random(20000) < 0.5, labels, rng.integers(-1, 2000, 20000))
    ours = external_scores(labels, clusters)
    for score, value in _scikit_learn_external(labels, clusters).items():
        assert ours[score] == pytest.approx(value, rel=0, abs=1e-11 if score == "ami" else 1e-12), score


def test_noise_counted_as_one_cluster_and_left_out():
    # Reference: scikit-learn's ARI on all points (noise label -1 is just another cluster id) and on clustered points.
    scores = noise_aware_scores(LABELS, CLUSTERS)
    kept = CLUSTERS != -1
    assert scores["ari"] == pytest.approx(skm.adjusted_rand_score(LABELS, CLUSTERS), rel=0, abs=1e-12)
    assert scores["ari_clustered"] == pytest.approx(skm.adjusted_rand_score(LABELS[kept], CLUSTERS[kept]), rel=0, abs=1e-12)
    assert abs(scores["ari"] - scores["ari_clustered"]) > 0.01  # the two ways differ on this case
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


def _epsilon_squared_by_hand(lengths: np.ndarray, groups: np.ndarray) -> float:
    """Kelley's epsilon^2 (1935) written out from one-way ANOVA sums of squares: (SS_b - (k - 1) MS_w) / SS_t."""
    log_len = np.log(lengths)
    levels = np.unique(groups)
    k, n = levels.size, log_len.size
    ss_total = ((log_len - log_len.mean()) ** 2).sum()
    ss_within = sum(((log_len[groups == g] - log_len[groups == g].mean()) ** 2).sum() for g in levels)
    return (ss_total - ss_within - (k - 1) * ss_within / (n - k)) / ss_total


def _lengths(rng, n: int) -> np.ndarray:
    """Token counts shaped like real texts: log-normal, median about 20."""
    return np.maximum(1, np.round(np.exp(rng.normal(3.0, 0.7, n)))).astype(int)


@pytest.mark.parametrize("sizes", [(3, 2, 1), (2, 2, 2), (1, 1, 4), (4, 1, 1), (5, 1)])
def test_eta_squared_expects_k_minus_1_over_n_minus_1_by_chance_and_epsilon_squared_zero(sizes):
    # The rule the chance correction rests on, checked by enumerating every way of dealing 6 lengths to the groups
    # (all 720 permutations): the mean eta^2 is exactly (k - 1) / (N - 1), whatever the group sizes, so the mean
    # epsilon^2 = 1 - (1 - eta^2)(N - 1)/(N - k) is exactly 0.
    from itertools import permutations

    lengths = np.array([3, 5, 8, 13, 40, 90])
    groups = np.repeat(np.arange(len(sizes)), sizes)
    eta2 = [length_eta_squared(np.array(p), groups) for p in permutations(lengths)]
    eps2 = [length_epsilon_squared(np.array(p), groups) for p in permutations(lengths)]
    k, n = len(sizes), lengths.size
    assert np.mean(eta2) == pytest.approx((k - 1) / (n - 1), abs=1e-12)
    assert np.mean(eps2) == pytest.approx(0.0, abs=1e-12)


def test_epsilon_squared_equals_anova_sums_of_squares_from_statsmodels_and_scipy():
    # References: statsmodels' one-way ANOVA table (anova_lm of an OLS fit of log length on the groups as a factor)
    # gives SS_between and SS_residual; Kelley's epsilon^2 = (SS_b - (k - 1) MS_w) / SS_total. scipy.stats.f_oneway
    # gives F, and epsilon^2 = (k - 1)(F - 1) / ((k - 1) F + N - k) (the same quantity through F). Noise (-1) is a group.
    import pandas as pd
    import statsmodels.api as sm
    from statsmodels.formula.api import ols

    rng = np.random.default_rng(3)
    lengths = _lengths(rng, 400)
    groups = rng.integers(-1, 7, 400) + (lengths > 30)
    frame = pd.DataFrame({"log_len": np.log(lengths), "group": groups})
    table = sm.stats.anova_lm(ols("log_len ~ C(group)", data=frame).fit(), typ=1)
    ss_b, ss_w = table.loc["C(group)", "sum_sq"], table.loc["Residual", "sum_sq"]
    df_b, df_w = table.loc["C(group)", "df"], table.loc["Residual", "df"]
    from_statsmodels = (ss_b - df_b * ss_w / df_w) / (ss_b + ss_w)
    assert length_epsilon_squared(lengths, groups) == pytest.approx(from_statsmodels, rel=1e-10)
    assert length_eta_squared(lengths, groups) == pytest.approx(ss_b / (ss_b + ss_w), rel=1e-10)
    f = stats.f_oneway(*[np.log(lengths[groups == g]) for g in np.unique(groups)]).statistic
    k, n = np.unique(groups).size, lengths.size
    assert length_epsilon_squared(lengths, groups) == pytest.approx((k - 1) * (f - 1) / ((k - 1) * f + n - k), rel=1e-10)
    assert length_epsilon_squared(lengths, groups) == pytest.approx(_epsilon_squared_by_hand(lengths, groups), rel=1e-10)


@pytest.mark.parametrize("k", [6, 30, 100, 200])
def test_length_index_of_random_clusters_is_zero_for_any_number_of_clusters(k):
    # Acceptance (issue 13 item 7): clusters that ignore length, N = 1,200, mean over 20 draws: |index| < 0.02 for
    # k in {6, 30, 100, 200}. Raw eta^2 gave 0.001, 0.020, 0.080 and 0.159 (its chance level (k - 1)/(N - 1)).
    rng = np.random.default_rng(k)
    values = []
    for _ in range(20):
        lengths = _lengths(rng, 1200)
        values.append(length_confound_index(lengths, rng.integers(0, k, 1200), rng.integers(0, 6, 1200)))
    assert abs(np.mean(values)) < 0.02, np.mean(values)


def test_length_index_clusters_are_length_bins_stays_near_one():
    # Acceptance: clusters = length bins still >= 0.9. Topics independent of length, clusters are length deciles;
    # k equal-share bins of a uniform variable explain 1 - 1/k^2 of its variance (0.99 for k = 10), and the
    # correction for 10 groups of 2,000 texts is tiny.
    lengths = RNG.integers(3, 61, 2000)
    labels = RNG.integers(0, 6, 2000)
    clusters = np.digitize(np.log(lengths), np.quantile(np.log(lengths), np.linspace(0.1, 0.9, 9)))
    assert length_confound_index(lengths, clusters, labels) >= 0.9
    many_bins = np.digitize(np.log(lengths), np.quantile(np.log(lengths), np.linspace(0.01, 0.99, 99)))
    assert length_confound_index(lengths, many_bins, labels) >= 0.9  # 100 clusters that are length bins, too


def test_length_index_clusters_independent_of_length_gives_near_zero():
    lengths = RNG.integers(3, 61, 2000)
    labels = RNG.integers(0, 6, 2000)
    clusters = RNG.integers(0, 6, 2000)
    assert abs(length_confound_index(lengths, clusters, labels)) < 0.01


@pytest.mark.parametrize("with_noise", [False, True])
def test_length_index_clusters_equal_labels_is_exactly_zero(with_noise):
    # Acceptance: clusters = labels give exactly 0, whatever the ids (renamed, or one class called -1 as noise is).
    lengths = RNG.integers(3, 61, 500)
    labels = (lengths > 30).astype(int) + RNG.integers(0, 2, 500) * 2  # labels themselves tied to length
    clusters = np.where(labels == 0, -1, labels + 7) if with_noise else labels + 7
    assert length_confound_index(lengths, clusters, labels) == 0.0


def test_length_index_discounts_the_labels_own_length_signal():
    # The index is (eps2_c - eps2_y) / (1 - eps2_y), each epsilon^2 written out here from ANOVA sums of squares.
    lengths = RNG.integers(3, 61, 1000)
    labels = (lengths > 30).astype(int)
    clusters = np.digitize(lengths, [15, 30, 45])
    e_c, e_y = _epsilon_squared_by_hand(lengths, clusters), _epsilon_squared_by_hand(lengths, labels)
    assert length_confound_index(lengths, clusters, labels) == pytest.approx((e_c - e_y) / (1 - e_y), rel=1e-10)
    # Clusters that ignore length on labels that carry it: below 0, not clipped (less length than the topics).
    assert length_confound_index(lengths, RNG.integers(0, 4, 1000), labels) < -0.5


def test_noise_is_one_length_group_of_its_own():
    # HDBSCAN leaves the short texts unclustered and splits the rest at random: the clusters say nothing about length
    # among clustered texts, but which texts are noise is all about length. Noise counted as its own group sees it
    # (reference: scipy.stats.f_oneway over the groups, noise included); dropping noise, or scattering it over
    # singleton groups, would not.
    rng = np.random.default_rng(5)
    lengths = _lengths(rng, 1000)
    clusters = np.where(lengths < np.median(lengths), -1, rng.integers(0, 4, 1000))
    labels = rng.integers(0, 5, 1000)
    log_len = np.log(lengths)
    f = stats.f_oneway(*[log_len[clusters == g] for g in np.unique(clusters)]).statistic
    assert length_eta_squared(lengths, clusters) == pytest.approx(f * 4 / (f * 4 + 1000 - 5), rel=1e-10)
    kept = clusters != -1
    assert length_eta_squared(lengths[kept], clusters[kept]) < 0.02  # without noise: no length signal at all
    scores = trial_scores(clusters, lengths, labels)
    assert scores["length_eta2_clusters"] > 0.5 and scores["length_confound_index"] > 0.5
    assert scores["length_epsilon2_clusters"] == pytest.approx(_epsilon_squared_by_hand(lengths, clusters), rel=1e-10)


def test_epsilon_squared_edge_cases():
    lengths = np.array([3, 5, 8, 13])
    assert length_epsilon_squared(lengths, np.zeros(4, int)) == 0.0  # one group
    assert math.isnan(length_epsilon_squared(lengths, np.arange(4)))  # every text its own group: undefined
    assert length_epsilon_squared(np.full(4, 7), np.array([0, 0, 1, 1])) == 0.0  # no length variance


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


def _duplicated_vectors(seed: int, width: int = 384) -> tuple[np.ndarray, np.ndarray]:
    """80 random vectors, each twice (texts that occur twice in a corpus), and clusters that give both copies the
    same id: the hdbscan package's validity_index fails its spanning-tree assertion on these."""
    rng = np.random.default_rng(seed)
    base = rng.normal(size=(80, width)).astype(np.float32) * 10
    return np.vstack([base, base]).astype(np.float64), np.tile(rng.integers(0, 3, 80), 2)


@pytest.mark.parametrize("seed", range(4))
def test_dbcv_of_identical_points_is_nan_with_its_reason(seed):
    # Reference: the hdbscan package itself raises on this input (its AssertionError is the bug), and DBCV is
    # undefined for identical points (Moulavi et al. 2014, the all-points core distance; scikit-learn pull request
    # 28244 refuses identical points). The same vectors without the copies keep a finite value.
    from hdbscan.validity import validity_index

    from harness.metrics import density_validity, density_validity_undefined

    vectors, clusters = _duplicated_vectors(seed)
    with pytest.raises(AssertionError):
        validity_index(vectors, clusters)
    assert math.isnan(density_validity(vectors, clusters))
    assert "identical points" in density_validity_undefined(vectors, clusters)
    assert density_validity_undefined(vectors[:80], clusters[:80]) == ""
    assert math.isfinite(density_validity(vectors[:80], clusters[:80]))


def test_a_trial_on_duplicate_vectors_finishes_with_dbcv_nan_and_its_reason(tmp_path):
    # A real sweep on the user's own vectors (family precomputed) in which every text's vector occurs twice: the
    # trial must finish, log every other score, and say on the seed run why DBCV is NaN.
    from harness.engine.runner import run_sweep_file

    from conftest import finished_runs, write_sweep

    vectors, _ = _duplicated_vectors(0)
    np.save(tmp_path / "v.npy", vectors.astype(np.float32))
    sweep = write_sweep(tmp_path, """name: duplicates
datasets: [{source: synthetic, n_texts: 160, topic_share: 0.4, seed: 4}]
models: [{name: mine, family: precomputed, vectors: v.npy}]
grid:
  pooling: [mean]
  normalize: [none]
  reduce: [{method: none}]
  cluster: [{method: kmeans, k: labels}]
evidence: {resamples: 20, permutations: 19}
""")
    result = run_sweep_file(sweep, tmp_path / "results")
    assert not result.failed, [f.error for f in result.failed]
    _, _, trials = finished_runs(f"sqlite:///{tmp_path / 'results' / 'mlflow.db'}", "duplicates")
    (trial,) = trials
    metrics = trial.data.metrics
    assert math.isnan(metrics["dbcv"])
    assert "identical points" in trial.data.tags["harness.nan_reason.dbcv"]
    for name in ("ari", "ami", "nmi", "v_measure", "silhouette", "cluster_size_entropy", "length_eta2_clusters"):
        assert math.isfinite(metrics[name]), name


SILHOUETTE_CASES = [  # (points, clusters, width, noise share, max_points): two clusters, many, singletons, sampled
    (200, 2, 8, 0.0, 5000), (600, 6, 32, 0.2, 5000), (600, 40, 16, 0.1, 5000), (150, 75, 4, 0.0, 5000),
    (900, 5, 384, 0.3, 300), (400, 3, 2, 0.0, 5000),
]


@pytest.mark.parametrize("n,k,width,noise,max_points", SILHOUETTE_CASES)
@pytest.mark.parametrize("held", [False, True])
def test_silhouette_equals_scikit_learn_on_every_case(n, k, width, noise, max_points, held):
    # Reference: sklearn.metrics.silhouette_score(metric="cosine") on the same clustered (and sampled) points, in
    # float64. Both ways of computing it: the points' own distances, and the block taken from the distances of all
    # points that the executor keeps for several labellings (harness.metrics._internal.DISTANCES_KEPT_UP_TO).
    from harness.metrics._internal import _clustered_sample, cosine_distances, silhouette_cosine

    rng = np.random.default_rng(n + k)
    vectors = (rng.normal(size=(n, width)) + rng.integers(0, 3, (n, 1))).astype(np.float32)
    clusters = rng.integers(0, k, n)
    clusters[rng.random(n) < noise] = -1
    rows = _clustered_sample(clusters, max_points, 7)
    reference = skm.silhouette_score(vectors[rows].astype(np.float64), clusters[rows], metric="cosine")
    found = silhouette_cosine(vectors, clusters, max_points=max_points, seed=7,
                              distances=cosine_distances(vectors) if held else None)
    assert found == pytest.approx(reference, rel=1e-12, abs=1e-15)


def _pvalue_drawing_each_time(lengths, groups, permutations, seed):
    """length_eta2_pvalue as it was before shuffles were kept between calls: drawn anew in each call."""
    log_len = np.log(np.asarray(lengths, dtype=float))
    _, codes = np.unique(groups, return_inverse=True)
    sizes = np.bincount(codes).astype(float)
    centred = log_len - log_len.mean()
    membership = np.zeros((codes.size, sizes.size))
    membership[np.arange(codes.size), codes] = 1.0
    between = lambda values: ((values @ membership) ** 2 / sizes).sum(axis=1)  # noqa: E731
    observed = between(centred[None, :])[0]
    rng, exceed, done = np.random.default_rng(seed), 0, 0
    while done < permutations:
        chunk = min(256, permutations - done)
        shuffled = np.stack([rng.permutation(centred) for _ in range(chunk)])
        exceed += int((between(shuffled) >= observed - 1e-12 * max(abs(observed), 1.0)).sum())
        done += chunk
    return (1 + exceed) / (1 + permutations)


@pytest.mark.parametrize("limit", [16_000_000, 600_000])
def test_kept_shuffles_give_the_same_pvalues_as_shuffles_drawn_each_time(limit, monkeypatch):
    # The shuffles of a corpus's lengths depend on the lengths, the seed and the count only, so every clustering of
    # the corpus with that seed reuses them. Checked against drawing them in each call, over seeds, counts that are
    # and are not multiples of the chunk, groupings with and without noise and strongly length-tied ones, calls
    # interleaved; with the default bound nothing is evicted, with a small one the least recently used sets are
    # evicted first and sets larger than the bound are never kept.
    from harness.metrics import _length, length_eta2_pvalue

    monkeypatch.setattr(_length, "_SHUFFLES_KEPT_UP_TO", limit)
    monkeypatch.setattr(_length, "_kept_shuffles", {})
    rng = np.random.default_rng(5)
    corpora = [rng.integers(1, 300, n) for n in (40, 500, 1200)]
    evicted, kept_newest, too_big = 0, 0, 0
    for round_ in range(2):
        for lengths in corpora:
            for seed in (0, 1, 2):
                for permutations in (1, 99, 256, 999):
                    for groups in (rng.integers(-1, 4, lengths.size), np.argsort(np.argsort(lengths)) * 5 // lengths.size):
                        before = list(_length._kept_shuffles)
                        assert length_eta2_pvalue(lengths, groups, permutations=permutations, seed=seed) == \
                            _pvalue_drawing_each_time(lengths, groups, permutations, seed)
                        after = list(_length._kept_shuffles)
                        assert sum(k[1] * k[2] for k in after) <= limit
                        gone = [k for k in before if k not in after]
                        assert gone == before[:len(gone)]  # the least recently used first
                        evicted += len(gone)
                        if permutations * lengths.size <= limit:
                            kept_newest += after[-1][:3] == (seed, permutations, lengths.size)  # used last
                        else:
                            too_big += 1
                            assert after == before  # never kept, and nothing evicted for it
    assert kept_newest == sum(2 * 3 * 2 for p in (1, 99, 256, 999) for n in (40, 500, 1200) if p * n <= limit)
    assert (evicted > 0) == (limit < 16_000_000) and (too_big > 0) == (limit < 16_000_000)


def test_kept_shuffles_belong_to_their_own_lengths():
    # Two corpora of the same size, the same seed and count: each clustering gets the shuffles of its own lengths
    # (the key holds a hash of the values), checked against drawing them anew.
    from harness.metrics import length_eta2_pvalue

    rng = np.random.default_rng(12)
    groups = rng.integers(0, 4, 200)
    wide, narrow = rng.integers(1, 300, 200), rng.integers(1, 10, 200)
    for lengths in (wide, narrow, wide, narrow):
        assert length_eta2_pvalue(lengths, groups, permutations=99, seed=0) == \
            _pvalue_drawing_each_time(lengths, groups, 99, 0)
    shifted = wide.astype(float) * 2  # another set of values with the same log-length shape differs too
    assert length_eta2_pvalue(shifted, groups, permutations=99, seed=0) == _pvalue_drawing_each_time(shifted, groups, 99, 0)


def test_kept_shuffles_are_shared_safely_between_threads(monkeypatch):
    # A Dask worker may score on several threads: with a bound small enough to evict at almost every call and
    # threads switching as often as the interpreter allows, eight threads drawing shuffles at once raise nothing
    # (without the lock: "dictionary changed size during iteration" and KeyErrors, seen), and every p-value equals
    # the one drawn anew.
    import sys
    import threading

    from harness.metrics import _length, length_eta2_pvalue

    monkeypatch.setattr(_length, "_SHUFFLES_KEPT_UP_TO", 2000)
    monkeypatch.setattr(_length, "_kept_shuffles", {})
    errors, wrong = [], []

    def work(thread: int) -> None:
        rng = np.random.default_rng(thread)
        shared = [np.random.default_rng(k).integers(1, 100, 30) for k in range(6)]  # the same corpora in every thread
        for _ in range(400):
            lengths = shared[int(rng.integers(0, 6))] if rng.random() < 0.5 else rng.integers(1, 100, int(rng.integers(5, 40)))
            groups, permutations, seed = rng.integers(0, 3, lengths.size), int(rng.integers(1, 30)), int(rng.integers(0, 3))
            try:
                if length_eta2_pvalue(lengths, groups, permutations=permutations, seed=seed) != \
                        _pvalue_drawing_each_time(lengths, groups, permutations, seed):
                    wrong.append((thread, seed))
            except Exception as err:
                errors.append(repr(err))

    interval = sys.getswitchinterval()
    sys.setswitchinterval(1e-6)
    try:
        threads = [threading.Thread(target=work, args=(t,)) for t in range(8)]
        for thread in threads:
            thread.start()
        for thread in threads:
            thread.join()
    finally:
        sys.setswitchinterval(interval)
    assert errors == [] and wrong == []
