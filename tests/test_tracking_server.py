"""A sweep against a real MLflow tracking server on a loopback port."""

from __future__ import annotations

import os
import signal
import subprocess
import sys

from harness.cli import main
from harness.engine.runner import run_sweep_file

from conftest import configuration_runs, finished_runs, free_port, wait_healthy, write_sweep


def test_a_sweep_logs_to_a_tracking_server(tmp_path, tiny_model_dir):
    port = free_port()
    # A light server (ENVIRONMENT.md): one worker, no job runner, SQLite backend, loopback only.
    server = subprocess.Popen(
        [sys.executable, "-m", "mlflow", "server", "--backend-store-uri", f"sqlite:///{tmp_path / 'server.db'}",
         "--artifacts-destination", str(tmp_path / "server-artifacts"), "--host", "127.0.0.1", "--port", str(port),
         "--workers", "1"],
        env={**os.environ, "MLFLOW_SERVER_ENABLE_JOB_EXECUTION": "false"},
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
    uri = f"http://127.0.0.1:{port}"
    try:
        wait_healthy(uri)
        sweep = write_sweep(tmp_path, f"""
name: served
datasets:
  - {{source: synthetic, n_texts: 150, topic_share: 0.5}}
models: [{tiny_model_dir}]
grid:
  pooling: [mean, cls]
  reduce:
    - {{method: pca, n_components: 5}}
  cluster:
    - {{method: kmeans, k: labels}}
evidence: {{resamples: 50}}
""")
        result = run_sweep_file(sweep, tmp_path / "results", tracking_uri=uri)
        assert not result.failed
        client, sweeps, trials = finished_runs(uri, "served")
        assert len(sweeps) == 1 and len(trials) == 2 and len(configuration_runs(uri, "served")) == 2
        assert {a.path for a in client.list_artifacts(trials[0].info.run_id)} >= {"assignments.parquet", "clusters.parquet"}
        assert not (tmp_path / "results" / "mlflow.db").exists()  # nothing went to the local store
        # The report and the card read the served store only: the winner's map and settings were logged there.
        winner = result.rankings["town_requests"].winner.configuration
        assert {a.path for a in client.list_artifacts(winner.run_id)} >= {"configuration.json", "winner_map.json",
                                                                          "winner_map.parquet"}
        for command in ("report", "cite"):
            assert main([command, "served", "--tracking-uri", uri, "--results-dir", str(tmp_path / "results")]) == 0
        page = (tmp_path / "results" / "reports" / "served" / "report.html").read_text()
        assert "<img id='cluster-map-" in page
        assert {a.path for a in client.list_artifacts(sweeps[0].info.run_id, "report")} >= {"report/report.html"}
    finally:
        os.killpg(server.pid, signal.SIGTERM)  # the server and its workers, by the PID we started
        server.wait(30)
