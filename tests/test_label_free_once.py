"""Silhouette and DBCV once per distinct labelling (issue 17, item 4).

The rule: each is a function of the vectors, the labels and max_points, and of the seed only where it subsamples
(scikit-learn's silhouette_score and hdbscan's validity_index are deterministic). So seeds of a seed-free
clustering, which share labels, share the scores; a seeded clustering's seeds do not.
"""

from __future__ import annotations

import numpy as np
from hdbscan.validity import validity_index
from sklearn.metrics import silhouette_score

from harness.engine.cache import StageCache
from harness.engine.runner import loaded_corpora, prepared_sweep
from harness.engine.stages import StageExecutor

from conftest import write_sweep

SWEEP = """
name: label_free
datasets:
  - {{source: synthetic, n_texts: 150, topic_share: 0.5, seed: 3}}
models: [{{name: tfidf-svd-12, family: lexical, dimensions: 12}}]
grid:
  pooling: [mean]
  layers: [last]
  normalize: [l2]
  reduce: [{{method: pca, n_components: 5}}]
  cluster:
    - {{method: hdbscan, min_cluster_size: 8}}
    - {{method: kmeans, k: 4}}
  seeds: [0, 1, 2]
evidence: {{max_points: {max_points}}}
"""


def _scores(executor, trials, max_points):
    return {t.key: {name: executor.label_free_score(t, name, executor.clustered(t), max_points=max_points)
                    for name in ("silhouette", "dbcv")} for t in trials}


def test_seeds_that_share_labels_share_the_computation_and_the_value(tmp_path):
    prepared = prepared_sweep(write_sweep(tmp_path, SWEEP.format(max_points=5000)))
    corpora = loaded_corpora(prepared)
    executor = StageExecutor(corpora, prepared.trials)
    found = _scores(executor, prepared.trials, 5000)
    labellings = {(t.stages["cluster"].key, executor.clustered(t).tobytes()) for t in prepared.trials}
    distinct = {labels for _, labels in labellings}
    # hdbscan on PCA is seed-free: 1 labelling for 3 seeds; k-means is seeded: up to 3.
    assert len({k for k, _ in labellings}) == 4
    assert executor.work["silhouette_computations"] == executor.work["dbcv_computations"] == len(distinct)
    for trial in prepared.trials:
        clusters = executor.clustered(trial)
        kept = clusters != -1
        # Outside references: scikit-learn's silhouette_score (cosine, in float64 as the tool computes it) and
        # hdbscan's validity_index.
        pooled = np.asarray(executor.pooled(trial, own=True), dtype=np.float64)
        expected_silhouette = silhouette_score(pooled[kept], clusters[kept], metric="cosine")
        assert np.isclose(found[trial.key]["silhouette"], expected_silhouette, rtol=1e-12, atol=0)
        present = np.unique(clusters[kept])
        contiguous = np.where(kept, np.searchsorted(present, clusters), -1)
        expected_dbcv = validity_index(np.asarray(executor.reduced(trial), dtype=np.float64), contiguous)
        assert np.isclose(found[trial.key]["dbcv"], expected_dbcv, rtol=1e-12, atol=0, equal_nan=True)


def test_a_cached_score_is_read_back_not_recomputed(tmp_path):
    prepared = prepared_sweep(write_sweep(tmp_path, SWEEP.format(max_points=5000)))
    corpora, cache = loaded_corpora(prepared), StageCache(tmp_path / "cache")
    first = _scores(StageExecutor(corpora, prepared.trials, cache), prepared.trials, 5000)
    again = StageExecutor(corpora, prepared.trials, cache)
    np.testing.assert_equal(_scores(again, prepared.trials, 5000), first)  # NaN equals NaN here
    assert again.work["silhouette_computations"] == again.work["dbcv_computations"] == 0


def test_a_subsampled_score_is_computed_per_seed(tmp_path):
    # With max_points below the number of texts the sample depends on the seed, so shared labels do not share it.
    prepared = prepared_sweep(write_sweep(tmp_path, SWEEP.format(max_points=60)))
    corpora = loaded_corpora(prepared)
    executor = StageExecutor(corpora, prepared.trials)
    hdbscan_trials = [t for t in prepared.trials if t.clusterer.method == "hdbscan"]
    found = _scores(executor, hdbscan_trials, 60)
    assert executor.work["dbcv_computations"] == 3
    for trial in hdbscan_trials:  # each equals the same score computed alone for its seed
        alone = StageExecutor(corpora, [trial])
        np.testing.assert_equal(_scores(alone, [trial], 60)[trial.key], found[trial.key])
