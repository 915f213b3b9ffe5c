"""Killed at any point, a sweep loses nothing: each trial ends FINISHED once, the cache stays valid, scores are unchanged."""

from __future__ import annotations

import os
import subprocess
import sys

import pytest

from harness.engine.cache import StageCache
from harness.engine.runner import run_sweep_file

from conftest import configuration_runs, finished_runs, write_sweep

SWEEP = """
name: crashy
datasets:
  - {{source: synthetic, n_texts: 300, topic_share: 0.4, seed: 8}}
models:
  - {{name: {model}, batch_size: 32}}
grid:
  pooling: [mean, max]
  reduce:
    - {{method: umap, n_components: 4, n_neighbors: 10}}
  cluster:
    - {{method: kmeans, k: labels}}
    - {{method: hdbscan, min_cluster_size: 10}}
evidence: {{resamples: 100, permutations: 99}}
"""
# Killed in turn: while loading the model (a model too big for memory dies there: the sweep's record must be in
# the store by then), in the middle of the forward pass, inside the first UMAP fit, right after the second trial
# finished, and between the artifacts and the metrics of an MLflow write.
KILL_POINTS = ("model_load:1", "encode_batch:2", "umap_fit:1", "between_trials:2", "mlflow_write:1")
COMPARED = ("ari", "ami", "nmi", "v_measure", "length_confound_index", "coverage", "silhouette")


def test_sweep_survives_sigkill_at_every_kill_point(tmp_path, tiny_model_dir):
    sweep = write_sweep(tmp_path, SWEEP.format(model=tiny_model_dir))
    reference = run_sweep_file(sweep, tmp_path / "uninterrupted")
    expected = {r.trial.key: r.scores for r in reference.results}

    results = tmp_path / "results"
    command = [sys.executable, "-m", "harness.cli", "run", str(sweep), "--results-dir", str(results), "--no-progress"]
    for point in KILL_POINTS:
        done = subprocess.run(command, env={**os.environ, "HARNESS_CRASH_AT": point}, capture_output=True, timeout=300)
        assert done.returncode == -9, (point, done.stderr.decode()[-2000:])  # it really died by SIGKILL there

    final = run_sweep_file(sweep, results)
    assert not final.failed
    statuses = sorted(r.status for r in final.results)
    assert statuses == ["FINISHED", "FINISHED", "REUSED", "REUSED"]  # two trials had finished before the last kill

    uri = f"sqlite:///{results / 'mlflow.db'}"
    _, sweeps, trials = finished_runs(uri, "crashy")
    finished = [t.data.tags["harness.trial_key"] for t in trials if t.info.status == "FINISHED"]
    assert sorted(finished) == sorted(expected)  # every trial FINISHED exactly once
    assert all(t.info.status in ("FINISHED", "KILLED") for t in trials)
    assert sorted(s.info.status for s in sweeps) == ["FINISHED"] + ["KILLED"] * len(KILL_POINTS)
    assert all(c.info.status != "RUNNING" for c in configuration_runs(uri, "crashy"))

    cache = StageCache(results / "cache")
    entries = cache.entries()
    assert entries and all(cache.get(e.kind, e.key) is not None for e in entries)  # every checksum holds
    assert not list((results / "cache").rglob("*.tmp"))

    for result in final.results:
        for name in COMPARED:
            assert result.scores[name] == pytest.approx(expected[result.trial.key][name], nan_ok=True), name
