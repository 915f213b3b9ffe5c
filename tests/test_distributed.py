"""The Dask executor gives the same results as the local one."""

from __future__ import annotations

import pytest

from harness.engine.runner import run_sweep_file

from conftest import write_sweep

COMPARED = ("ari", "ami", "nmi", "length_confound_index", "coverage", "n_clusters", "silhouette", "dbcv")
# Computed from float32 vectors with BLAS sums whose order follows the process's torch/BLAS threads (1 on a
# worker, all cores here): equal to float32 rounding, observed within 2e-6 relative; the clusterings are equal.
FLOAT32_SCORES = {"silhouette": 1e-9, "dbcv": 1e-5}  # silhouette: computed in float64


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
    # A 2-worker LocalCluster on 127.0.0.1; 300 texts in chunks of 128: two full chunks and a shorter one.
    remote = run_sweep_file(sweep, tmp_path / "dask", executor="dask", chunk_texts=128)
    assert not local.failed and not remote.failed
    # The work was done on the cluster (adopted results), not recomputed here.
    assert remote.work["umap_fits"] == local.work["umap_fits"] == 4
    # 2 PCA reductions x (k-means for each of 2 seeds + HDBSCAN) + 4 seeded UMAP reductions x 2 clusterers
    assert remote.work["reduce_from_cluster"] == 6 and remote.work["cluster_from_cluster"] == 2 * 3 + 4 * 2
    assert "reduce_from_cluster" not in local.work
    # The UMAP neighbour graph: one per pooled vectors (2), built once on the cluster and shared by both seeds' fits
    # there, as here; the layouts equal the local ones (the scores below), so the fits started from the same graph.
    assert remote.work["neighbour_graphs"] == local.work["neighbour_graphs"] == 2
    assert remote.work["graph_from_cluster"] == 2
    # The forward pass ran on the cluster (one model, one dataset: one encode key, in chunks), and so did the
    # scoring of every seed run; none of it here.
    assert remote.work["encode_from_cluster"] == 1 and remote.work["encode_chunks_from_cluster"] >= 1
    assert "model_loads" not in remote.work and local.work["model_loads"] == 1
    assert remote.work["scores_from_cluster"] == len(remote.results) == 16
    expected = {r.trial.key: r.scores for r in local.results}
    for result in remote.results:
        for name in COMPARED:
            assert result.scores[name] == pytest.approx(expected[result.trial.key][name], nan_ok=True,
                                                        rel=FLOAT32_SCORES.get(name)), name
        # Every score the run logs, label-free ones and descriptions' coherence included; not the timings.
        assert set(result.scores) == set(expected[result.trial.key])
        for name, value in result.scores.items():
            if not name.endswith("_seconds"):
                assert value == pytest.approx(expected[result.trial.key][name], nan_ok=True,
                                              rel=FLOAT32_SCORES.get(name)), name
    # The configurations' evidence (means over seeds, bootstrap intervals) from the cluster, the same.
    local_configs = {c.trials[0].config_key: c.metrics for c in local.configurations}
    for configuration in remote.configurations:
        for name, value in configuration.metrics.items():
            if "_seconds" not in name:
                assert value == pytest.approx(local_configs[configuration.trials[0].config_key][name], nan_ok=True,
                                              rel=FLOAT32_SCORES.get(name.removesuffix("_std"), 1e-4 if name.endswith("_std") else None)), name


def test_a_stage_that_fails_on_the_cluster_is_a_failed_trial_and_the_sweep_goes_on(tmp_path, tiny_model_dir,
                                                                                   overflowing_model_dir):
    """The second model's float16 vectors overflow to infinity and PCA refuses them: on a LocalCluster as
    locally, its seed runs are FAILED with the same error, the first model's finish and are ranked, and the
    sweep run is closed (FAILED), never left RUNNING."""
    from conftest import finished_runs

    sweep = write_sweep(tmp_path, f"""
name: distributed_failure
datasets:
  - {{source: synthetic, n_texts: 90, n_topics: 3, topic_share: 0.5, seed: 6}}
models: [{tiny_model_dir}, {overflowing_model_dir}]
grid:
  pooling: [mean]
  reduce:
    - {{method: pca, n_components: 4}}
  cluster:
    - {{method: kmeans, k: labels}}
  seeds: [0, 1]
storage_dtype: float16
evidence: {{resamples: 50, permutations: 19}}
""")
    local = run_sweep_file(sweep, tmp_path / "local")
    remote = run_sweep_file(sweep, tmp_path / "dask", executor="dask")
    assert remote.work["reduce_failed_on_cluster"] == 1  # one PCA serves both seeds; it failed on a worker

    def outcome(result):
        return {r.trial.key: (r.status, r.error.splitlines()[0] if r.error else None) for r in result.results}

    assert outcome(remote) == outcome(local)
    failed = {r.trial.model.name for r in remote.failed}
    assert failed == {str(overflowing_model_dir)} and len(remote.failed) == 2
    assert all(r.error.startswith("ValueError: Input X contains infinity") for r in remote.failed)
    (ranking,) = remote.rankings.values()
    assert ranking.winner.configuration.trials[0].model.name == str(tiny_model_dir)
    assert ranking.winner.configuration.metrics["ari"] == pytest.approx(
        local.rankings["town_requests"].winner.configuration.metrics["ari"])

    client, (parent,), seeds = finished_runs(remote.tracking_uri, "distributed_failure")
    assert parent.info.status == "FAILED" and parent.data.metrics["n_failed"] == 2
    assert sorted(s.info.status for s in seeds) == ["FAILED", "FAILED", "FINISHED", "FINISHED"]
    failed_run = next(s for s in seeds if s.info.status == "FAILED")
    assert "raised on a Dask worker" in failed_run.data.tags["harness.traceback"]  # the worker's traceback is kept
