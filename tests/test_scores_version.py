"""The score formulas are versioned: SCORES_VERSION (harness/engine/plan.py) enters every trial and configuration key.

GOLDEN holds every score of a small fixed input (three seeds' clusterings of 120 texts, their vectors and token
counts, built from arithmetic rather than a random generator) together with the SCORES_VERSION it was recorded
under. A change that moves any of them without bumping SCORES_VERSION would let a resumed sweep reuse metrics
logged under the old formulas, so this test fails until the version is bumped and the values recorded anew. It
compares at rel 1e-9 (the silhouette and the leakage go through BLAS, whose last bits depend on its threads), so a
change that moves scores only in their last bits passes it: such a change bumps the version by hand (as 5 and 6 did).
The values were produced by the code of this repository at that version (no outside source); the external ones
are also checked against scikit-learn below, so a recorded value cannot be wrong in that part.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from sklearn import metrics as skm

from harness.engine.plan import SCORES_VERSION
from harness.metrics import length_leakage_r2
from harness.score.evidence import configuration_evidence
from harness.score.scoring import VECTOR_SCORES, label_free_scores, trial_scores

N = 120


def fixed_input():
    """Labels, three seeds' clusterings, token counts and vectors: deterministic, no random generator."""
    i = np.arange(N)
    labels = i % 4
    clusterings = [np.where(i % k == 0, (labels + 1) % 4, labels) for k in (5, 7, 3)]
    clusterings[2] = np.where(i % 11 == 0, -1, clusterings[2])  # a few noise points
    counts = 5 + (i * 7) % 23 + 3 * labels
    angle = 2 * np.pi * labels / 4 + 0.05 * np.sin(i)
    vectors = np.column_stack([np.cos(angle), np.sin(angle), 0.1 * np.cos(3 * i), 0.1 * np.sin(5 * i)])
    return labels, clusterings, counts, vectors


def fixed_scores() -> dict[str, float]:
    """Every seed score (prefixed seedN.) and every configuration metric of the fixed input."""
    labels, clusterings, counts, vectors = fixed_input()
    out, seed_scores = {}, []
    for seed, clusters in enumerate(clusterings):
        scores = trial_scores(clusters, counts, labels)
        # silhouette on the "pooled" vectors, DBCV on the "reduced" ones, as StageExecutor.label_free_score does
        vector_scores = {name: float(VECTOR_SCORES[name](points, clusters, max_points=5000, seed=seed))
                         for name, points in (("silhouette", vectors), ("dbcv", vectors[:, :3]))}
        scores.update(label_free_scores(clusters, counts, vector_scores, seed=seed, permutations=99))
        # the length leakage the run caches by its vectors' key (StageExecutor.length_leakage), on the same vectors
        scores["length_leakage_r2"] = length_leakage_r2(vectors, np.maximum(counts, 1), seed=0)
        seed_scores.append(scores)
        out.update({f"seed{seed}.{k}": v for k, v in scores.items()})
    evidence = configuration_evidence(seed_scores, clusterings, labels, resamples=200, seed=0)
    out.update({f"configuration.{k}": v for k, v in evidence.metrics().items()})
    return out


GOLDEN = {  # recorded with this repository's code at SCORES_VERSION 6 (see the module docstring)
    "version": 6,
    "scores": {
        "configuration.length_leakage_r2": -0.14165085682711664,
        "configuration.length_leakage_r2_std": 0.0,
        "configuration.length_leakage_r2_valid_seeds": 3.0,
        "seed0.length_leakage_r2": -0.14165085682711664,
        "seed1.length_leakage_r2": -0.14165085682711664,
        "seed2.length_leakage_r2": -0.14165085682711664,
        "configuration.ami": 0.5863810171254438,
        "configuration.ami_ci_high": 0.6955874818739142,
        "configuration.ami_ci_low": 0.4323021284882793,
        "configuration.ami_clustered": 0.6144240487591507,
        "configuration.ami_clustered_std": 0.08054762242731513,
        "configuration.ami_clustered_valid_seeds": 3.0,
        "configuration.ami_std": 0.12704633851698877,
        "configuration.ami_valid_seeds": 3.0,
        "configuration.ari": 0.5170708158367693,
        "configuration.ari_ci_high": 0.6626213719616295,
        "configuration.ari_ci_low": 0.31862005663714577,
        "configuration.ari_clustered": 0.5357864322474398,
        "configuration.ari_clustered_std": 0.13114994978684782,
        "configuration.ari_clustered_valid_seeds": 3.0,
        "configuration.ari_std": 0.16200419316590953,
        "configuration.ari_valid_seeds": 3.0,
        "configuration.cluster_size_entropy": 0.9999030217357792,
        "configuration.cluster_size_entropy_std": 0.0001003615219279655,
        "configuration.cluster_size_entropy_valid_seeds": 3.0,
        "configuration.completeness": 0.5906467853317322,
        "configuration.completeness_clustered": 0.6257470557883074,
        "configuration.completeness_clustered_std": 0.0775620061845193,
        "configuration.completeness_clustered_valid_seeds": 3.0,
        "configuration.completeness_std": 0.13597261757265985,
        "configuration.completeness_valid_seeds": 3.0,
        "configuration.coverage": 0.9694444444444444,
        "configuration.coverage_std": 0.0529237746757157,
        "configuration.coverage_valid_seeds": 3.0,
        "configuration.dbcv": -0.8998732253861723,
        "configuration.dbcv_std": 0.02319407744062899,
        "configuration.dbcv_valid_seeds": 3.0,
        "configuration.homogeneity": 0.6094327448210025,
        "configuration.homogeneity_clustered": 0.6257005732919301,
        "configuration.homogeneity_clustered_std": 0.07749904343824167,
        "configuration.homogeneity_clustered_valid_seeds": 3.0,
        "configuration.homogeneity_std": 0.10423736245965722,
        "configuration.homogeneity_valid_seeds": 3.0,
        "configuration.length_confound_index": -0.1141197345226882,
        "configuration.length_confound_index_std": 0.07502414268921077,
        "configuration.length_confound_index_valid_seeds": 3.0,
        "configuration.length_epsilon2_clusters": 0.11651460577759627,
        "configuration.length_epsilon2_clusters_std": 0.059493367028789,
        "configuration.length_epsilon2_clusters_valid_seeds": 3.0,
        "configuration.length_epsilon2_labels": 0.20701037164474334,
        "configuration.length_epsilon2_labels_std": 0.0,
        "configuration.length_epsilon2_labels_valid_seeds": 3.0,
        "configuration.length_eta2_clusters": 0.1414537710885968,
        "configuration.length_eta2_clusters_std": 0.05339479378129731,
        "configuration.length_eta2_clusters_valid_seeds": 3.0,
        "configuration.length_eta2_labels": 0.22700170681336332,
        "configuration.length_eta2_labels_std": 0.0,
        "configuration.length_eta2_labels_valid_seeds": 3.0,
        "configuration.length_eta2_pvalue": 0.030000000000000002,
        "configuration.length_eta2_pvalue_std": 0.03464101615137755,
        "configuration.length_eta2_pvalue_valid_seeds": 3.0,
        "configuration.n_clusters": 4.0,
        "configuration.n_clusters_std": 0.0,
        "configuration.n_clusters_valid_seeds": 3.0,
        "configuration.n_seeds": 3.0,
        "configuration.nmi": 0.5994681556534637,
        "configuration.nmi_ci_high": 0.7041076061581952,
        "configuration.nmi_ci_low": 0.4530517678192015,
        "configuration.nmi_clustered": 0.6257238122109793,
        "configuration.nmi_clustered_std": 0.07753051759746861,
        "configuration.nmi_clustered_valid_seeds": 3.0,
        "configuration.nmi_std": 0.1210053302672608,
        "configuration.nmi_valid_seeds": 3.0,
        "configuration.noise_fraction": 0.030555555555555555,
        "configuration.noise_fraction_std": 0.05292377467571569,
        "configuration.noise_fraction_valid_seeds": 3.0,
        "configuration.silhouette": 0.3820501635229809,
        "configuration.silhouette_std": 0.21131064960284063,
        "configuration.silhouette_valid_seeds": 3.0,
        "configuration.stability_ari": 0.28155649794414095,
        "configuration.v_measure": 0.5994681556534638,
        "configuration.v_measure_ci_high": 0.7041076061581955,
        "configuration.v_measure_ci_low": 0.4530517678192014,
        "configuration.v_measure_clustered": 0.6257238122109795,
        "configuration.v_measure_clustered_std": 0.07753051759746865,
        "configuration.v_measure_clustered_valid_seeds": 3.0,
        "configuration.v_measure_std": 0.12100533026726085,
        "configuration.v_measure_valid_seeds": 3.0,
        "seed0.ami": 0.6286028095688705,
        "seed0.ami_clustered": 0.6286028095688705,
        "seed0.ari": 0.5622988505747126,
        "seed0.ari_clustered": 0.5622988505747126,
        "seed0.cluster_size_entropy": 1.0,
        "seed0.completeness": 0.639035952556319,
        "seed0.completeness_clustered": 0.639035952556319,
        "seed0.coverage": 1.0,
        "seed0.dbcv": -0.921856999655008,
        "seed0.homogeneity": 0.639035952556319,
        "seed0.homogeneity_clustered": 0.639035952556319,
        "seed0.length_confound_index": -0.07760629041145006,
        "seed0.length_epsilon2_clusters": 0.14546938825333744,
        "seed0.length_epsilon2_labels": 0.20701037164474334,
        "seed0.length_eta2_clusters": 0.16701217678476588,
        "seed0.length_eta2_labels": 0.22700170681336332,
        "seed0.length_eta2_pvalue": 0.01,
        "seed0.n_clusters": 4.0,
        "seed0.nmi": 0.639035952556319,
        "seed0.nmi_clustered": 0.639035952556319,
        "seed0.noise_fraction": 0.0,
        "seed0.silhouette": 0.43416718243528385,
        "seed0.v_measure": 0.639035952556319,
        "seed0.v_measure_clustered": 0.639035952556319,
        "seed1.ami": 0.6869408335371389,
        "seed1.ami_clustered": 0.6869408335371389,
        "seed1.ari": 0.6516546904977,
        "seed1.ari_clustered": 0.6516546904977,
        "seed1.cluster_size_entropy": 0.99979958856591,
        "seed1.completeness": 0.6958060540047265,
        "seed1.completeness_clustered": 0.6958060540047265,
        "seed1.coverage": 1.0,
        "seed1.dbcv": -0.902128997667461,
        "seed1.homogeneity": 0.695666606515595,
        "seed1.homogeneity_clustered": 0.695666606515595,
        "seed1.length_confound_index": -0.06434191913148783,
        "seed1.length_epsilon2_clusters": 0.15598789710500083,
        "seed1.length_epsilon2_labels": 0.20701037164474334,
        "seed1.length_eta2_clusters": 0.17726551314437056,
        "seed1.length_eta2_labels": 0.22700170681336332,
        "seed1.length_eta2_pvalue": 0.01,
        "seed1.n_clusters": 4.0,
        "seed1.nmi": 0.6957363232727427,
        "seed1.nmi_clustered": 0.6957363232727427,
        "seed1.noise_fraction": 0.0,
        "seed1.silhouette": 0.5624257909975838,
        "seed1.v_measure": 0.6957363232727428,
        "seed1.v_measure_clustered": 0.6957363232727428,
        "seed2.ami": 0.443599408270322,
        "seed2.ami_clustered": 0.5277285031714428,
        "seed2.ari": 0.3372589064378951,
        "seed2.ari_clustered": 0.3934057556699066,
        "seed2.cluster_size_entropy": 0.9999094766414273,
        "seed2.completeness": 0.43709834943415105,
        "seed2.completeness_clustered": 0.5423991608038764,
        "seed2.coverage": 0.9083333333333333,
        "seed2.dbcv": -0.8756336788360481,
        "seed2.homogeneity": 0.4935956753910937,
        "seed2.homogeneity_clustered": 0.5423991608038764,
        "seed2.length_confound_index": -0.2004109940251267,
        "seed2.length_epsilon2_clusters": 0.048086531974450564,
        "seed2.length_epsilon2_labels": 0.20701037164474334,
        "seed2.length_eta2_clusters": 0.080083623336654,
        "seed2.length_eta2_labels": 0.22700170681336332,
        "seed2.length_eta2_pvalue": 0.07,
        "seed2.n_clusters": 4.0,
        "seed2.nmi": 0.4636321911313294,
        "seed2.nmi_clustered": 0.5423991608038764,
        "seed2.noise_fraction": 0.09166666666666666,
        "seed2.silhouette": 0.1495575171360749,
        "seed2.v_measure": 0.4636321911313294,
        "seed2.v_measure_clustered": 0.5423991608038764,
    },
}


def test_the_external_scores_of_the_fixed_input_are_scikit_learn_s():
    # Reference: scikit-learn's adjusted_rand_score and adjusted_mutual_info_score on each seed's clustering.
    labels, clusterings, _, _ = fixed_input()
    scores = fixed_scores()
    for seed, clusters in enumerate(clusterings):
        assert scores[f"seed{seed}.ari"] == pytest.approx(skm.adjusted_rand_score(labels, clusters), abs=1e-12)
        assert scores[f"seed{seed}.ami"] == pytest.approx(skm.adjusted_mutual_info_score(labels, clusters), abs=1e-12)


def test_scores_of_a_fixed_input_change_only_with_scores_version():
    assert SCORES_VERSION == GOLDEN["version"], (
        f"SCORES_VERSION is {SCORES_VERSION} but the golden scores here were recorded under {GOLDEN['version']}: "
        "record the scores of this version in GOLDEN (tests/test_scores_version.py)")
    scores = fixed_scores()
    assert sorted(scores) == sorted(GOLDEN["scores"]), (
        "the set of scores changed: bump SCORES_VERSION in harness/engine/plan.py and record the new values in GOLDEN")
    moved = {name: (GOLDEN["scores"][name], value) for name, value in scores.items()
             if not (math.isnan(value) and math.isnan(GOLDEN["scores"][name]))
             and value != pytest.approx(GOLDEN["scores"][name], rel=1e-9, abs=1e-12)}
    assert not moved, (f"scores changed without a new SCORES_VERSION: {moved}; bump SCORES_VERSION in "
                       "harness/engine/plan.py (resumed sweeps must not reuse metrics of the old formulas) and record the "
                       "new values in GOLDEN (tests/test_scores_version.py)")
