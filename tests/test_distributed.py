"""The Dask executor gives the same results as the local one."""

from __future__ import annotations

import pytest

from harness.runner import run_sweep_file

from conftest import write_sweep

COMPARED = ("ari", "ami", "nmi", "length_confound_index", "coverage", "n_clusters", "silhouette", "dbcv")


def test_dask_local_cluster_equals_local_executor(tmp_path, tiny_model_dir):
    sweep = write_sweep(tmp_path, f"""
name: distributed
datasets:
  - {{source: synthetic, n_texts: 300, topic_share: 0.4, seed: 6}}
models: [{tiny_model_dir}]
grid:
  pooling: [mean, max]
  reduce:
    - {{method: umap, n_components: 4, n_neighbors: 10}}
    - {{method: pca, n_components: 6}}
  cluster:
    - {{method: kmeans, k: labels}}
    - {{method: hdbscan, min_cluster_size: 10}}
  seeds: [0, 1]
evidence: {{resamples: 100, permutations: 99}}
""")
    local = run_sweep_file(sweep, tmp_path / "local")
    remote = run_sweep_file(sweep, tmp_path / "dask", executor="dask")  # a 2-worker LocalCluster on 127.0.0.1
    assert not local.failed and not remote.failed
    # The work was done on the cluster (adopted results), not recomputed here.
    assert remote.work["umap_fits"] == local.work["umap_fits"] == 4
    # 2 PCA reductions x (k-means for each of 2 seeds + HDBSCAN) + 4 seeded UMAP reductions x 2 clusterers
    assert remote.work["reduce_from_cluster"] == 6 and remote.work["cluster_from_cluster"] == 2 * 3 + 4 * 2
    assert "reduce_from_cluster" not in local.work
    expected = {r.trial.key: r.scores for r in local.results}
    for result in remote.results:
        for name in COMPARED:
            assert result.scores[name] == pytest.approx(expected[result.trial.key][name], nan_ok=True), name
