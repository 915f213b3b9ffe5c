"""What a seed run logs, and that logging it draws nothing (issue 17, item 3).

A seed run holds its params, tags and scores (each sent as one batch) and its two tables; the token-count figure
is drawn by the report from assignments.parquet, so a run imports no plotting library.
"""

from __future__ import annotations

from conftest import finished_runs, write_sweep
from test_cli_imports import _imported

SWEEP = """
name: seed_logging
datasets:
  - {source: synthetic, n_texts: 80, seed: 2}
models: [{name: tfidf-svd-8, family: lexical, dimensions: 8}]
grid:
  pooling: [mean]
  layers: [last]
  normalize: [l2]
  reduce: [{method: pca, n_components: 4}]
  cluster: [{method: kmeans, k: 3}]
  seeds: [0, 1]
"""


def test_a_run_logs_tables_and_scores_per_seed_and_draws_no_figure(tmp_path):
    results = tmp_path / "results"
    found = _imported("run", str(write_sweep(tmp_path, SWEEP)), "--results-dir", str(results), "--no-progress")
    assert found["code"] == 0, found["out"]
    assert "matplotlib" not in found["heavy"]
    uri = f"sqlite:///{results / 'mlflow.db'}"
    client, _, seeds = finished_runs(uri, "seed_logging")
    assert len(seeds) == 2
    for run in seeds:
        assert {a.path for a in client.list_artifacts(run.info.run_id)} == {"assignments.parquet", "clusters.parquet"}
        assert {"ari", "silhouette", "dbcv"} <= set(run.data.metrics) and run.data.params["seed"] in ("0", "1")
        # One batch: every score of the run carries the same timestamp.
        history = [client.get_metric_history(run.info.run_id, name)[0].timestamp for name in ("ari", "silhouette", "dbcv")]
        assert len(set(history)) == 1
