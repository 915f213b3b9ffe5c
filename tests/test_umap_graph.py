"""UMAP's neighbour graph: computed once per (vectors, metric, n_neighbors) and shared by every fit.

The rule the sharing rests on: a UMAP fit handed a neighbour graph gives the same layout (and so the same
labels) whether that graph was built for it alone or shared with other fits, for any seed, n_components and
min_dist; and the graph is keyed by exactly what it depends on.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy.spatial.distance import cdist

from harness.engine.plan import graph_stage
from harness.engine.runner import loaded_corpora, prepared_sweep
from harness.engine.stages import StageExecutor
from harness.geometry.cluster import cluster_labels
from harness.geometry.reduce import EXACT_NEIGHBOURS_UP_TO, UmapSettings, neighbour_graph, neighbour_method, umap_reduced

from conftest import write_sweep

SWEEP = """
name: graph
datasets:
  - {source: synthetic, n_texts: 200, topic_share: 0.4, seed: 5}
models: [{name: tfidf-svd-20, family: lexical, dimensions: 20}]
grid:
  pooling: [mean]
  layers: [last]
  normalize: [l2]
  reduce:
    - {method: umap, n_components: 2, n_neighbors: 10}
    - {method: umap, n_components: 3, n_neighbors: 10, min_dist: 0.1}
  cluster:
    - {method: hdbscan, min_cluster_size: 8}
  seeds: [0, 1, 2]
"""


@pytest.mark.parametrize("metric", ["cosine", "euclidean", "manhattan", "correlation"])
def test_the_exact_graph_is_each_points_nearest_neighbours_under_scipy(metric):
    vectors = np.random.default_rng(1).normal(size=(60, 5))
    graph = neighbour_graph(vectors, metric, 7, "exact")
    # scipy.spatial.distance.cdist is the outside reference for each metric's distances.
    reference = cdist(vectors, vectors, metric={"manhattan": "cityblock"}.get(metric, metric))  # scipy's name
    order = np.argsort(reference, axis=1, kind="stable")[:, :7]
    assert np.array_equal(graph[0].astype(int), order)
    np.testing.assert_allclose(graph[1], np.take_along_axis(reference, order, axis=1), atol=1e-6)  # euclidean: sklearn uses the dot-product form


def test_the_method_is_exact_up_to_the_stated_threshold():
    assert neighbour_method(EXACT_NEIGHBOURS_UP_TO) == "exact"
    assert neighbour_method(EXACT_NEIGHBOURS_UP_TO + 1) == "nndescent"


def test_a_shared_graph_gives_each_fit_the_layout_and_labels_it_gives_alone(tmp_path):
    prepared = prepared_sweep(write_sweep(tmp_path, SWEEP))
    corpora = loaded_corpora(prepared)
    trials = prepared.trials
    assert len(trials) == 6  # 3 seeds x 2 n_components
    shared = StageExecutor(corpora, trials)
    layouts = {t.key: shared.reduced(t).copy() for t in trials}
    labels = {t.key: shared.clustered(t).copy() for t in trials}
    assert shared.work["neighbour_graphs"] == 1 and shared.work["umap_fits"] == 6
    for trial in trials:
        alone = StageExecutor(corpora, [trial])  # builds its own graph
        assert np.array_equal(alone.reduced(trial), layouts[trial.key]), trial.name
        assert alone.work["neighbour_graphs"] == 1
        # Outside the executor: umap-learn fitted directly on the same neighbours, then HDBSCAN on its layout.
        vectors = shared.transformed(trial)
        direct = umap_reduced(vectors, trial.reducer, trial.seed,
                              neighbour_graph(vectors, trial.reducer.metric, trial.reducer.n_neighbors, "exact"))
        assert np.array_equal(direct, layouts[trial.key]), trial.name
        n_classes = corpora[trial.dataset].n_classes
        assert np.array_equal(cluster_labels(direct, trial.clusterer, trial.seed, n_classes), labels[trial.key])
    # Seeds still vary the layout: the graph is shared, the layouts are not.
    assert len({layouts[t.key].tobytes() for t in trials}) == 6


def test_the_graph_key_changes_with_what_the_graph_depends_on_and_nothing_else():
    base = UmapSettings(method="umap", n_components=5, n_neighbors=15, min_dist=0.0, metric="cosine")
    key = graph_stage("vectors-a", base, 1000).key
    changes = {  # every field of UmapSettings, each changed once
        "n_components": (base.model_copy(update={"n_components": 3}), False),
        "min_dist": (base.model_copy(update={"min_dist": 0.2}), False),
        "n_neighbors": (base.model_copy(update={"n_neighbors": 10}), True),
        "metric": (base.model_copy(update={"metric": "euclidean"}), True),
    }
    assert set(changes) | {"method"} == set(UmapSettings.model_fields)
    for name, (settings, changes_graph) in changes.items():
        assert (graph_stage("vectors-a", settings, 1000).key != key) is changes_graph, name
    assert graph_stage("vectors-b", base, 1000).key != key  # other vectors
    assert graph_stage("vectors-a", base, EXACT_NEIGHBOURS_UP_TO + 1).key != key  # approximate instead of exact
    metrics = ["cosine", "euclidean", "manhattan", "correlation"]
    keys = {graph_stage("v", base.model_copy(update={"metric": m, "n_neighbors": k}), 100).key
            for m, k in itertools.product(metrics, [5, 10, 15])}
    assert len(keys) == len(metrics) * 3


def test_seeds_share_the_graph_stage_in_the_plan(tmp_path):
    trials = prepared_sweep(write_sweep(tmp_path, SWEEP)).trials
    assert len({t.stages["graph"].key for t in trials}) == 1
    assert len({t.stages["reduce"].key for t in trials}) == 6
    assert all(t.stages["reduce"].parent == t.stages["graph"].key for t in trials)


def test_the_approximate_graph_finds_nearly_the_exact_neighbours_and_is_seed_fixed():
    # Above EXACT_NEIGHBOURS_UP_TO the graph comes from NN-descent; checked here on a small set against the exact one.
    vectors = np.random.default_rng(4).normal(size=(500, 8)).astype(np.float32)
    exact = neighbour_graph(vectors, "cosine", 10, "exact")
    approximate = neighbour_graph(vectors, "cosine", 10, "nndescent")
    recall = np.mean([len(set(a) & set(e)) / 10 for a, e in zip(approximate[0].astype(int), exact[0].astype(int))])
    assert recall >= 0.95
    assert np.array_equal(approximate, neighbour_graph(vectors, "cosine", 10, "nndescent"))  # fixed graph seed
