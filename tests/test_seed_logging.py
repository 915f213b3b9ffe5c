"""What a seed run logs, and that logging it draws nothing (issue 17, item 3).

A seed run holds its params, tags and scores (params and scores in one batch) and its two tables; the token-count figure
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


def test_params_sent_with_the_results_reach_every_run_however_it_ends(tmp_path):
    # A seed run's params go in the batch of its results (one store call less); a run that fails, or is killed
    # before any result, still gets them with its end. Read back from a real SQLite store.
    from mlflow.tracking import MlflowClient

    from harness.track.tracking import SweepTracker, default_tracking_uri

    uri = default_tracking_uri(tmp_path)
    tracker = SweepTracker(uri, tmp_path / "artifacts", "params_due")
    parent = tracker.start_run("sweep", None, "sweep", {"n_trials": 3}, {})
    params = {"pooling": "mean", "seed": 1, "reduce.method": "pca"}
    finished = tracker.start_run("a", parent, "trial", params, {}, params_with_results=True)
    tracker.log_results(finished, {"ari": 0.5}, tags={"note": "x"})
    tracker.end(finished, "FINISHED")
    failed = tracker.start_run("b", parent, "trial", params, {}, params_with_results=True)
    tracker.log_results(failed, {}, tags={"harness.error_type": "ValueError"})
    tracker.end(failed, "FAILED", error="ValueError: bad")
    killed = tracker.start_run("c", parent, "trial", params, {}, params_with_results=True)
    tracker.end(killed, "KILLED")
    client = MlflowClient(uri)
    for run_id, status in ((finished, "FINISHED"), (failed, "FAILED"), (killed, "KILLED")):
        run = client.get_run(run_id)
        assert run.info.status == status
        assert run.data.params == {k: str(v) for k, v in params.items()}, status
    assert client.get_run(finished).data.metrics == {"ari": 0.5}
    assert client.get_run(failed).data.tags["harness.error"] == "ValueError: bad"
    assert not tracker._params_due  # nothing left to send
