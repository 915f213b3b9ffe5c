"""Post-processing steps against their published formulas and scikit-learn."""

from __future__ import annotations

import numpy as np
from sklearn.decomposition import PCA

from harness.engine.runner import prepared_sweep
from harness.geometry.transforms import all_but_the_top, centered, length_removed, whitened
from harness.metrics import length_leakage_r2

from conftest import write_sweep

RNG = np.random.default_rng(3)
# Anisotropic data, as sentence embeddings are: a few directions carry most of the variance.
VECTORS = (RNG.normal(size=(300, 12)) * np.linspace(5, 0.2, 12) + 3.0).astype(np.float32)


def test_whitening_gives_identity_covariance_and_matches_scikit_learn_up_to_sign():
    # Su et al. (2021): W = U diag(1/sqrt(lambda)); reference: sklearn.decomposition.PCA(whiten=True).
    ours = whitened(VECTORS, 8)
    assert np.abs(np.cov(ours, rowvar=False) - np.eye(8)).max() < 1e-6
    reference = PCA(n_components=8, whiten=True, svd_solver="full").fit_transform(VECTORS.astype(np.float64))
    signs = np.sign((ours * reference).sum(axis=0))
    assert np.abs(ours * signs - reference).max() < 1e-4


def test_all_but_the_top_matches_the_published_formula():
    # Mu & Viswanath (2018), Algorithm 1: x~ = x - mean; u_1..u_D = top PCA directions of x~;
    # x' = x~ - sum_i (u_i . x~) u_i. Written out directly here with scikit-learn's PCA for the directions.
    d = 3
    mean = VECTORS.astype(np.float64).mean(axis=0)
    tilde = VECTORS - mean
    directions = PCA(n_components=d, svd_solver="full").fit(VECTORS.astype(np.float64)).components_
    expected = tilde - sum(np.outer(tilde @ u, u) for u in directions)
    assert np.abs(all_but_the_top(VECTORS, d) - expected).max() < 1e-4


def test_centering_subtracts_the_corpus_mean():
    assert np.abs(centered(VECTORS).mean(axis=0)).max() < 1e-5


def test_remove_length_takes_planted_length_out():
    lengths = RNG.integers(3, 60, 600)
    direction = RNG.normal(size=16)
    direction /= np.linalg.norm(direction)
    # Length planted along one (random, not axis-aligned) direction, in isotropic noise.
    embedding = RNG.normal(size=(600, 16)) + np.outer(np.log(lengths) - np.log(lengths).mean(), direction) * 3
    assert length_leakage_r2(embedding, lengths) > 0.8
    cleaned = length_removed(embedding, lengths)
    assert length_leakage_r2(cleaned, lengths) < 0.05
    # Every remaining dimension is uncorrelated with log length on the fitted data.
    log_len = np.log(lengths) - np.log(lengths).mean()
    assert np.abs((cleaned - cleaned.mean(axis=0)).T @ log_len).max() < 1e-3 * len(lengths)


SWEEP = """
name: remedies
datasets:
  - {{source: synthetic, n_texts: 200}}
models: [{model}]
grid:
  pooling: [mean, mean_sqrt_len]
  transform:
    - none
    - l2
    - [center, remove_length, l2]
    - {{method: whiten, k: 8}}
    - [{{method: all_but_the_top, d: 2}}, l2]
  normalize: [none, l2]
  reduce:
    - {{method: pca, n_components: 5}}
  cluster:
    - {{method: kmeans, k: labels}}
"""


def test_chains_parse_plan_and_share_work(tmp_path, tiny_model_dir):
    prepared = prepared_sweep(write_sweep(tmp_path, SWEEP.format(model=tiny_model_dir)))
    names = {t.params["transform"] for t in prepared.trials}
    assert names == {"none", "l2", "center>remove_length>l2", "whiten8", "all_but_the_top2>l2"}
    by_name = {t.name: t for t in prepared.trials}
    assert len(by_name) == len(prepared.trials)  # every trial has its own name
    model = tiny_model_dir.name
    # transform l2 + normalize none is the same chain as transform none + normalize l2: two configurations, two
    # names, computed once.
    as_transform = by_name[f"town_requests/{model}/last/mean/l2/pca5/kmeanslabels/s0"]
    as_normalize = by_name[f"town_requests/{model}/last/mean/none+l2/pca5/kmeanslabels/s0"]
    assert (as_transform.transform, as_transform.normalize) != (as_normalize.transform, as_normalize.normalize)
    assert as_transform.key != as_normalize.key and as_transform.config_key != as_normalize.config_key
    assert as_transform.stages["cluster"].key == as_normalize.stages["cluster"].key
    assert as_normalize.equivalent_to == as_transform.key or as_transform.equivalent_to == as_normalize.key
    l2_first = [t for t in prepared.trials if t.steps and t.steps[0].method == "l2" and t.pooling == "mean_sqrt_len"]
    assert l2_first and all(t.equivalent_to for t in l2_first)  # after l2, mean_sqrt_len is mean
    centred_first = [t for t in prepared.trials if t.steps and t.steps[0].method == "center" and t.pooling == "mean_sqrt_len"]
    assert centred_first and not any(t.equivalent_to for t in centred_first)  # centring first is scale-sensitive


def test_a_chain_runs_end_to_end(tmp_path, tiny_model_dir):
    from harness.engine.runner import run_sweep_file

    sweep = write_sweep(tmp_path, SWEEP.format(model=tiny_model_dir).replace("  normalize: [none, l2]\n", "")
                        .replace("pooling: [mean, mean_sqrt_len]", "pooling: [mean]"))
    result = run_sweep_file(sweep, tmp_path / "results")
    assert [r.status for r in result.results] == ["FINISHED"] * 5
    assert result.work["transforms"] == 5
