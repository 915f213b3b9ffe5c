"""Agglomerative clustering: settings refused at the door, labels checked against references, seed-free."""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from harness.cli import main
from harness.errors import SweepError
from harness.geometry.cluster import (
    AGGLOMERATIVE_MAX_TEXTS, CLUSTERERS, SEEDED_CLUSTERERS, AgglomerativeSettings, HdbscanSettings, KmeansSettings,
    cluster_labels, clustering_limits,
)
from harness.sweep import load_sweep

from conftest import MINILM, finished_runs, write_sweep

VALID = [(linkage, metric) for linkage, metric in itertools.product(("ward", "average", "complete", "single"),
                                                                    ("euclidean", "cosine"))
         if not (linkage == "ward" and metric == "cosine")]


def _blobs(n: int = 150, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    centres = rng.normal(scale=4.0, size=(4, 6))
    truth = rng.integers(0, 4, size=n)
    return (centres[truth] + rng.normal(size=(n, 6))).astype(np.float32), truth


@pytest.mark.parametrize("linkage, metric", VALID)
@pytest.mark.parametrize("cut", [{"k": 4}, {"k": "labels"}, {"distance_threshold": 2.5}])
def test_labels_equal_scikit_learns_on_the_same_input(linkage, metric, cut):
    # Reference: sklearn.cluster.AgglomerativeClustering (scikit-learn 1.9), called directly with the same settings.
    from sklearn.cluster import AgglomerativeClustering

    vectors, _ = _blobs()
    threshold = cut.get("distance_threshold")
    if threshold is not None and metric == "cosine":
        threshold = 0.05  # cosine distances lie in [0, 2]
    settings = AgglomerativeSettings(method="agglomerative", linkage=linkage, metric=metric,
                                     **({"distance_threshold": threshold} if threshold is not None else {"k": cut["k"]}))
    ours = cluster_labels(vectors, settings, seed=0, n_classes=4)
    reference = AgglomerativeClustering(n_clusters=None if threshold is not None else 4, distance_threshold=threshold,
                                        linkage=linkage, metric=metric).fit_predict(vectors)
    assert np.array_equal(ours, reference)
    assert 1 < np.unique(ours).size < vectors.shape[0]  # a cut that tells something apart


@pytest.mark.parametrize("linkage, metric", VALID)
def test_the_partition_equals_scipys_hierarchy_cut_at_k(linkage, metric):
    # Independent reference: scipy.cluster.hierarchy.linkage + fcluster(criterion="maxclust") on the same input;
    # cluster ids differ between the libraries, so the partitions are compared (ARI = 1 means the same partition).
    from scipy.cluster.hierarchy import fcluster, linkage as scipy_linkage
    from sklearn.metrics import adjusted_rand_score

    vectors, _ = _blobs(seed=1)
    ours = cluster_labels(vectors, AgglomerativeSettings(method="agglomerative", linkage=linkage, metric=metric, k=4),
                          seed=0, n_classes=None)
    tree = scipy_linkage(vectors.astype(np.float64), method=linkage, metric=metric)
    assert adjusted_rand_score(fcluster(tree, t=4, criterion="maxclust"), ours) == 1.0


def test_every_clusterer_outside_the_seeded_registry_ignores_the_seed():
    # Other stages (stage keys, stability) trust SEEDED_CLUSTERERS: a clusterer left out of it must give the same
    # labels for any seed. Checked for every registered clusterer that claims so.
    vectors, _ = _blobs(n=200, seed=2)
    examples = {"hdbscan": HdbscanSettings(method="hdbscan", min_cluster_size=10),
                "kmeans": KmeansSettings(method="kmeans", k=4),
                "agglomerative": AgglomerativeSettings(method="agglomerative", linkage="average", k=4)}
    assert set(examples) == set(CLUSTERERS)
    assert "agglomerative" not in SEEDED_CLUSTERERS
    for method in sorted(set(CLUSTERERS) - SEEDED_CLUSTERERS):
        runs = [cluster_labels(vectors, examples[method], seed=seed, n_classes=4) for seed in (0, 1, 7)]
        assert all(np.array_equal(runs[0], other) for other in runs[1:]), method


@pytest.mark.parametrize("entry, message", [
    ("{method: agglomerative, linkage: ward, metric: cosine}",
     "grid.cluster[0]: linkage ward needs metric euclidean (it merges the pair that least increases the "
     "within-cluster sum of squares, a Euclidean quantity); got cosine"),
    ("{method: agglomerative, k: 5, distance_threshold: 0.5}",
     "grid.cluster[0]: give k or distance_threshold, not both: the tree is cut at a number of clusters or at a "
     "merge distance"),
    ("{method: agglomerative, linkage: median}", "grid.cluster[0].linkage: input should be 'ward', 'average', "
                                                 "'complete' or 'single'"),
    ("{method: agglomerative, distance_threshold: 0}", "grid.cluster[0].distance_threshold: input should be greater "
                                                       "than 0"),
])
def test_impossible_settings_are_refused_at_the_door(tmp_path, entry, message):
    sweep = write_sweep(tmp_path, f"name: a\ndatasets: [{{source: synthetic, n_texts: 100}}]\nmodels: [{MINILM}]\n"
                                  f"grid:\n  pooling: [mean]\n  cluster:\n    - {entry}\n")
    with pytest.raises(SweepError) as err:
        load_sweep(sweep)
    assert str(err.value).startswith(f"{sweep}:7: {message}")


def test_defaults_cut_at_the_number_of_gold_classes():
    settings = AgglomerativeSettings(method="agglomerative")
    assert (settings.linkage, settings.metric, settings.k, settings.distance_threshold) == ("ward", "euclidean",
                                                                                            "labels", None)
    assert AgglomerativeSettings(method="agglomerative", distance_threshold=1.0).k is None


def test_the_memory_limit_is_stated_and_refused_above_it():
    ward = AgglomerativeSettings(method="agglomerative", k=5)
    assert clustering_limits(ward, AGGLOMERATIVE_MAX_TEXTS, 5) is None
    problem = clustering_limits(ward, AGGLOMERATIVE_MAX_TEXTS + 1, 5)
    assert problem.startswith("agglomerative clustering with linkage ward keeps every pairwise distance: 20001 texts "
                              "need about 3.2 GB, and it is offered up to 20000 texts")
    single = AgglomerativeSettings(method="agglomerative", linkage="single", k=5)
    assert clustering_limits(single, 10 * AGGLOMERATIVE_MAX_TEXTS, 5) is None  # a spanning tree: linear memory
    assert clustering_limits(AgglomerativeSettings(method="agglomerative", k=50), 40, 5) == \
        "k=50 exceeds the number of texts (40)"
    assert clustering_limits(AgglomerativeSettings(method="agglomerative"), 40, None) == \
        "k: labels needs a dataset with a label column"


def test_a_corpus_above_the_limit_is_refused_once_its_size_is_known(tmp_path, capsys, monkeypatch):
    # The limit is lowered for the test so that a small corpus crosses it; the check is the same code path.
    import harness.geometry.cluster as cluster_module

    monkeypatch.setattr(cluster_module, "AGGLOMERATIVE_MAX_TEXTS", 150)
    sweep = write_sweep(tmp_path, f"name: big\ndatasets: [{{source: synthetic, n_texts: 151}}]\nmodels: [{MINILM}]\n"
                                  "grid:\n  pooling: [mean]\n  cluster:\n    - {method: agglomerative, linkage: average}\n")
    results = tmp_path / "results"
    assert main(["run", str(sweep), "--results-dir", str(results), "--no-progress"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.endswith("sweep.yaml:7: grid.cluster[0]: agglomerative clustering with linkage average keeps every "
                        "pairwise distance: 151 texts need about 0.0 GB, and it is offered up to 150 texts; sample the "
                        "dataset, use linkage single, or kmeans or hdbscan (dataset 'town_requests')")
    assert not results.exists()


def test_a_sweep_clusters_once_for_every_seed_and_logs_its_settings(tmp_path, tiny_model_dir):
    sweep = write_sweep(tmp_path, f"""
name: agglo
datasets:
  - {{source: synthetic, n_texts: 150, topic_share: 0.5, seed: 3}}
models:
  - name: {tiny_model_dir}
grid:
  pooling: [mean]
  reduce: [{{method: pca, n_components: 5}}]
  cluster:
    - {{method: agglomerative, linkage: average, metric: cosine, k: labels}}
    - {{method: agglomerative, distance_threshold: 4.0}}
  seeds: [0, 1]
""")
    results = tmp_path / "results"
    assert main(["run", str(sweep), "--results-dir", str(results), "--no-progress"]) == 0
    client, parents, trials = finished_runs(f"sqlite:///{results / 'mlflow.db'}", "agglo")
    assert len(trials) == 4 and parents[0].data.metrics["work.clusterings"] == 2  # seed-free: once per setting
    names = sorted({t.info.run_name.rsplit("/", 2)[-2] for t in trials})
    assert names == ["agglomerative-average-cos-labels", "agglomerative-ward-t4"]
    by_setting = {t.data.params["cluster.linkage"]: t for t in trials}
    assert by_setting["average"].data.params["cluster.metric"] == "cosine"
    assert by_setting["ward"].data.params["cluster.distance_threshold"] == "4.0"
