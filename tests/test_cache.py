"""The stage cache, resume, and computing equivalent trials once."""

from __future__ import annotations

import multiprocessing
import signal
import sqlite3
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from harness.cli import main
from harness.engine.cache import CacheWarning, StageCache
from harness.engine.runner import loaded_corpora, prepared_sweep, run_sweep_file
from harness.engine.stages import StageExecutor
from harness.geometry.transforms import l2_normalized

from conftest import configuration_runs, finished_runs, write_sweep

SWEEP = """
name: cached
datasets:
  - {{source: synthetic, n_texts: 240, topic_share: 0.4, seed: 5}}
models: [{model}]
grid:
  pooling: [cls, mean, mean_sqrt_len, max]
  layers: [last, second_last]
  normalize: [l2]
  reduce:
    - {{method: umap, n_components: 4, n_neighbors: 10}}
  cluster:
{cluster}
"""
CLUSTER_A = "    - {method: hdbscan, min_cluster_size: 8}\n    - {method: kmeans, k: labels}"
CLUSTER_B = "    - {method: hdbscan, min_cluster_size: 12}\n    - {method: kmeans, k: 4}"


def test_hit_returns_the_bytes_of_the_miss(tmp_path):
    cache = StageCache(tmp_path)
    array = np.random.default_rng(0).normal(size=(50, 7)).astype(np.float32)
    assert cache.get("pool", "k1") is None
    cache.put("pool", "k1", array, {"seconds": 0.1})
    hit, meta = cache.get("pool", "k1")
    assert hit.tobytes() == array.tobytes() and hit.dtype == array.dtype and hit.shape == array.shape
    assert meta["shape"] == [50, 7] and meta["dtype"] == "float32" and meta["kind"] == "pool"


def _damaged(folder: Path, damage: str) -> None:
    """One way an entry's files can differ from what was written (a process killed mid-write leaves none of
    these: writes are renamed into place; a power loss without fsync can leave any of them)."""
    data, meta = folder / "data.npy", folder / "meta.json"
    if damage == "data empty":
        data.write_bytes(b"")
    elif damage == "data cut in half":
        data.write_bytes(data.read_bytes()[: data.stat().st_size // 2])
    elif damage == "data zeroed":
        data.write_bytes(bytes(data.stat().st_size))
    elif damage == "data last byte flipped":
        raw = bytearray(data.read_bytes())
        raw[-1] ^= 0x01
        data.write_bytes(bytes(raw))
    elif damage == "data missing":
        data.unlink()
    elif damage == "meta empty":
        meta.write_bytes(b"")
    elif damage == "meta cut in half":
        meta.write_bytes(meta.read_bytes()[: meta.stat().st_size // 2])
    elif damage == "meta zeroed":
        meta.write_bytes(bytes(meta.stat().st_size))
    elif damage == "meta missing":
        meta.unlink()
    else:
        raise ValueError(damage)


DAMAGES = ("data empty", "data cut in half", "data zeroed", "data last byte flipped", "data missing",
           "meta empty", "meta cut in half", "meta zeroed", "meta missing")


@pytest.mark.parametrize("damage", DAMAGES)
def test_an_entry_whose_files_are_not_the_bytes_written_is_never_read(tmp_path, damage):
    """The rule that lets writes skip fsync: whatever state a write's files are left in, get() returns the array
    that was put or nothing, and the next put writes the entry again."""
    cache = StageCache(tmp_path)
    array = np.random.default_rng(1).normal(size=(40, 6)).astype(np.float32)
    cache.put("reduce", "kd", array, {"seconds": 0.0})
    _damaged(next((tmp_path / "reduce").glob("*/kd")), damage)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", CacheWarning)
        assert cache.get("reduce", "kd") is None
        cache.put("reduce", "kd", array, {"seconds": 0.0})
        hit, _ = cache.get("reduce", "kd")
    assert hit.tobytes() == array.tobytes()


def test_a_corrupted_array_is_detected_and_rebuilt(tmp_path, tiny_model_dir):
    sweep = write_sweep(tmp_path, SWEEP.format(model=tiny_model_dir, cluster=CLUSTER_A))
    prepared = prepared_sweep(sweep)
    corpora = loaded_corpora(prepared)
    cache = StageCache(tmp_path / "cache")
    trial = prepared.trials[0]
    first = StageExecutor(corpora, prepared.trials, cache).pooled(trial).copy()

    data = next((tmp_path / "cache" / "pool").glob(f"*/{trial.stages['pool'].key}/data.npy"))
    raw = bytearray(data.read_bytes())
    raw[-5] ^= 0xFF  # flip bits in the last value
    data.write_bytes(bytes(raw))

    again = StageExecutor(corpora, prepared.trials, cache)
    with pytest.warns(CacheWarning, match="checksum mismatch"):
        rebuilt = again.pooled(trial)
    assert again.work["forward_passes"] == 1
    assert np.array_equal(rebuilt, first)
    assert cache.get("pool", trial.stages["pool"].key) is not None  # the entry is valid again


def test_changing_only_clustering_runs_no_forward_pass_and_no_umap_fit(tmp_path, tiny_model_dir):
    results = tmp_path / "results"
    first = run_sweep_file(write_sweep(tmp_path, SWEEP.format(model=tiny_model_dir, cluster=CLUSTER_A), "a.yaml"), results)
    assert first.work["forward_passes"] == 1 and first.work["umap_fits"] == 6  # mean_sqrt_len shares mean's
    second = run_sweep_file(write_sweep(tmp_path, SWEEP.format(model=tiny_model_dir, cluster=CLUSTER_B), "b.yaml"), results)
    assert second.work.get("forward_passes", 0) == 0 and second.work.get("model_loads", 0) == 0
    assert second.work.get("umap_fits", 0) == 0
    # 6 reductions read back, and the winner's 2-D map too where the new winner has the old winner's vectors
    assert second.work.get("map_fits", 0) in (0, 1)
    assert second.work["clusterings"] == 12 and second.work["reduce_cache_hits"] == 6 + 1 - second.work.get("map_fits", 0)
    # The length leakage depends on the vectors only: read back, not cross-validated again.
    assert second.work.get("leakage_computations", 0) == 0 and first.work["leakage_computations"] > 0
    # The same sweep again: every trial reused, and the map is read back from the cache (a reduce-stage hit, the
    # only reduction this run touches), not fitted again.
    third = run_sweep_file(write_sweep(tmp_path, SWEEP.format(model=tiny_model_dir, cluster=CLUSTER_B), "b.yaml"), results)
    assert third.work.get("map_fits", 0) == 0 and third.work.get("umap_fits", 0) == 0
    assert third.work.get("reduce_cache_hits", 0) == 1


def test_equivalent_trials_are_computed_once_and_tagged(tmp_path, tiny_model_dir):
    sweep = write_sweep(tmp_path, SWEEP.format(model=tiny_model_dir, cluster=CLUSTER_A))
    prepared = prepared_sweep(sweep)
    by_name = {t.name: t for t in prepared.trials}
    twin = by_name[f"town_requests/{tiny_model_dir.name}/last/mean_sqrt_len/none+l2/umap4-nn10/kmeanslabels/s0"]
    original = by_name[f"town_requests/{tiny_model_dir.name}/last/mean/none+l2/umap4-nn10/kmeanslabels/s0"]
    assert twin.equivalent_to == original.key and twin.stages == original.stages

    # The equivalence itself: after L2 normalisation mean and mean_sqrt_len pooled vectors agree to 1e-6.
    import torch

    from harness.embed.pooling import POOLINGS

    hidden, mask = torch.randn(6, 11, 16), (torch.rand(6, 11) > 0.3).long()
    mask[:, 0] = 1
    mean = l2_normalized(POOLINGS["mean"](hidden, mask).numpy())
    scaled = l2_normalized(POOLINGS["mean_sqrt_len"](hidden, mask).numpy())
    assert np.abs(mean - scaled).max() <= 1e-6

    results = tmp_path / "results"
    result = run_sweep_file(sweep, results)
    assert result.work["umap_fits"] == 6  # 8 pooled variants, but mean_sqrt_len reuses mean's reduction twice
    client, _, children = finished_runs(result.tracking_uri, "cached")
    runs = {c.data.tags["harness.trial_key"]: c for c in children}
    assert runs[twin.key].data.tags["harness.equivalent_to"] == original.key
    twin_metrics, original_metrics = runs[twin.key].data.metrics, runs[original.key].data.metrics
    assert twin_metrics.keys() == original_metrics.keys()
    # Every figure of the shared clustering is the same number; the twin's own figures are measured on its own
    # vectors (mean_sqrt_len pooled), checked here against a recomputation from its own pooling.
    own_vectors = {"length_leakage_r2", "length_leakage_r2_pooled", "silhouette"}
    timings = {"encode_seconds", "reduce_seconds", "cluster_seconds"}
    for name in sorted(twin_metrics.keys() - own_vectors - timings):
        assert twin_metrics[name] == original_metrics[name] or (np.isnan(twin_metrics[name]) and np.isnan(original_metrics[name])), name
    from harness.embed.encode import pooled_variants, token_counts
    from harness.embed.models import loaded_encoder, resolve_model
    from harness.metrics import length_leakage_r2, silhouette_cosine

    texts = loaded_corpora(prepared)["town_requests"].texts
    encoder = loaded_encoder(resolve_model(str(tiny_model_dir)), None, False)
    pooled = pooled_variants(encoder, texts, [("last", "mean"), ("last", "mean_sqrt_len")], batch_size=64)
    counts = np.maximum(token_counts(encoder, texts), 1)
    for trial, pooling in ((twin, "mean_sqrt_len"), (original, "mean")):
        metrics = runs[trial.key].data.metrics
        own = pooled[("last", pooling)]
        assert metrics["length_leakage_r2"] == pytest.approx(length_leakage_r2(l2_normalized(own), counts), abs=1e-6)
        assert metrics["length_leakage_r2_pooled"] == pytest.approx(length_leakage_r2(own, counts), abs=1e-6)
    assert twin_metrics["length_leakage_r2_pooled"] != pytest.approx(original_metrics["length_leakage_r2_pooled"], abs=1e-3)
    assert twin_metrics["silhouette"] == pytest.approx(original_metrics["silhouette"], abs=1e-6)  # cosine: scale-free
    clusters = pd.read_parquet(client.download_artifacts(runs[twin.key].info.run_id, "assignments.parquet", str(tmp_path))).cluster
    assert twin_metrics["silhouette"] == pytest.approx(
        silhouette_cosine(pooled[("last", "mean_sqrt_len")], clusters.to_numpy(), max_points=5000, seed=0), abs=1e-9)


def _put_same_key(root: str, start, seed: int) -> None:
    array = np.full((400, 300), float(seed), dtype=np.float32)  # different bytes from each writer
    start.wait()
    StageCache(Path(root)).put("pool", "shared", array, {"writer": seed})


def test_two_processes_writing_one_key_leave_one_valid_entry(tmp_path):
    context = multiprocessing.get_context("spawn")
    start = context.Barrier(2)
    writers = [context.Process(target=_put_same_key, args=(str(tmp_path), start, seed)) for seed in (1, 2)]
    for writer in writers:
        writer.start()
    for writer in writers:
        writer.join(60)
        assert writer.exitcode == 0
    array, meta = StageCache(tmp_path).get("pool", "shared")
    assert np.all(array == float(meta["writer"]))  # the data is the one its metadata describes
    folder = next((tmp_path / "pool").glob("*/shared"))
    assert sorted(p.name for p in folder.iterdir()) == ["data.npy", "meta.json"]  # no temporary files left


def _finished_children(db: Path) -> int:
    if not db.exists():
        return 0
    try:
        with sqlite3.connect(db, timeout=1) as connection:
            return connection.execute(
                "select count(*) from runs r join tags t on r.run_uuid = t.run_uuid "
                "where t.key = 'harness.kind' and t.value = 'trial' and r.status = 'FINISHED'"
            ).fetchone()[0]
    except sqlite3.Error:
        return 0


def test_a_killed_sweep_resumes_without_rerunning_finished_trials(tmp_path, tiny_model_dir):
    sweep = write_sweep(tmp_path, f"""
name: resumable
datasets:
  - {{source: synthetic, n_texts: 200, seed: 3}}
models: [{tiny_model_dir}]
grid:
  pooling: [cls, mean, max, weighted_mean]
  layers: [last, 1, 2]
  reduce:
    - {{method: pca, n_components: 5}}
  cluster:
    - {{method: kmeans, k: labels}}
    - {{method: kmeans, k: 3}}
""")
    results = tmp_path / "results"
    process = subprocess.Popen([sys.executable, "-m", "harness.cli", "run", str(sweep), "--results-dir", str(results),
                                "--no-progress"], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 240
    while _finished_children(results / "mlflow.db") < 3 and process.poll() is None and time.monotonic() < deadline:
        time.sleep(0.05)
    process.send_signal(signal.SIGKILL)
    process.wait()
    finished_before = _finished_children(results / "mlflow.db")
    assert 3 <= finished_before < 24, "the sweep must be killed part-way"

    result = run_sweep_file(sweep, results)
    statuses = [r.status for r in result.results]  # one seed per configuration here
    assert statuses.count("REUSED") == finished_before
    assert statuses.count("FINISHED") == 24 - finished_before
    _, parents, children = finished_runs(result.tracking_uri, "resumable")
    finished_keys = [c.data.tags["harness.trial_key"] for c in children if c.info.status == "FINISHED"]
    assert sorted(finished_keys) == sorted({t.trial.key for t in result.results})  # each trial FINISHED once
    assert {p.info.status for p in parents} == {"KILLED", "FINISHED"}  # the killed run is no longer RUNNING
    assert all(c.info.status in ("FINISHED", "KILLED") for c in children)
    assert all(c.info.status in ("FINISHED", "KILLED") for c in configuration_runs(result.tracking_uri, "resumable"))


def test_cache_info_and_prune(tmp_path, capsys):
    cache = StageCache(tmp_path / "cache")
    cache.put("reduce", "aa11", np.zeros((10, 2), np.float32), {})
    cache.put("cluster", "bb22", np.zeros(10, np.int64), {})
    assert main(["cache", "info", "--cache-dir", str(tmp_path / "cache")]) == 0
    assert "total" in capsys.readouterr().out
    assert main(["cache", "prune", "--older-than", "1", "--cache-dir", str(tmp_path / "cache")]) == 0
    assert len(cache.entries()) == 2  # used just now
    assert main(["cache", "prune", "--older-than", "0", "--cache-dir", str(tmp_path / "cache")]) == 0
    assert cache.entries() == []


def test_float16_storage_is_a_separate_key_and_close_to_float32(tmp_path, tiny_model_dir):
    text = SWEEP.format(model=tiny_model_dir, cluster=CLUSTER_A)
    full = prepared_sweep(write_sweep(tmp_path, text, "a.yaml"))
    half = prepared_sweep(write_sweep(tmp_path, text + "storage_dtype: float16\n", "b.yaml"))
    assert full.trials[0].stages["pool"].key != half.trials[0].stages["pool"].key
    cache = StageCache(tmp_path / "cache")
    pooled_full = StageExecutor(loaded_corpora(full), full.trials, cache).pooled(full.trials[0])
    pooled_half = StageExecutor(loaded_corpora(half), half.trials, cache).pooled(half.trials[0])
    assert cache.get("pool", half.trials[0].stages["pool"].key)[0].dtype == np.float16
    assert np.allclose(pooled_half, pooled_full, rtol=1e-3, atol=1e-3)


def test_a_resumed_configuration_takes_every_figure_from_the_seeds_own_labels(tmp_path, tiny_model_dir, monkeypatch):
    # After a cache prune, a recomputation can disagree with the stored run (here the clusterer's output moved);
    # the reused seeds' means come from their runs, so the intervals and the stability must come from the labels
    # those runs logged too, not from the recomputation: every figure of a configuration from the same labels.
    import harness.geometry.cluster
    from sklearn.metrics import adjusted_rand_score

    from harness.score.evidence import bootstrap_distributions

    sweep = write_sweep(tmp_path, f"""
name: resumed
datasets:
  - {{source: synthetic, n_texts: 150, topic_share: 0.6, seed: 2}}
models: [{tiny_model_dir}]
grid:
  pooling: [mean]
  reduce:
    - {{method: pca, n_components: 5}}
  cluster:
    - {{method: kmeans, k: labels}}
  seeds: [0, 1]
evidence: {{resamples: 200, permutations: 19}}
""")
    results = tmp_path / "results"
    first = run_sweep_file(sweep, results)
    assert [r.status for r in first.results] == ["FINISHED", "FINISHED"]

    assert main(["cache", "prune", "--older-than", "0", "--cache-dir", str(results / "cache")]) == 0
    moved = lambda vectors, settings, seed, n_classes: np.arange(len(vectors)) % n_classes  # noqa: E731
    monkeypatch.setitem(harness.geometry.cluster.CLUSTERERS, "kmeans", moved)
    second = run_sweep_file(sweep, results)
    assert [r.status for r in second.results] == ["REUSED", "REUSED"]

    client, _, seed_runs = finished_runs(second.tracking_uri, "resumed")
    corpus_labels = loaded_corpora(prepared_sweep(sweep))["town_requests"].labels
    logged = [pd.read_parquet(client.download_artifacts(r.info.run_id, "assignments.parquet", str(tmp_path / r.info.run_id)))
              for r in sorted(seed_runs, key=lambda r: int(r.data.params["seed"]))]
    clusters = [table.cluster.to_numpy() for table in logged]
    (configuration,) = second.configurations
    metrics = configuration.metrics
    # The point estimate: the mean of the seeds' ARI, recomputed here from their own assignments (scikit-learn).
    assert metrics["ari"] == pytest.approx(np.mean([adjusted_rand_score(corpus_labels, c) for c in clusters]), abs=1e-12)
    # The interval: the bootstrap of those same labels. (Whether it contains the estimate is not a consistency check:
    # resampling with replacement duplicates texts, and duplicates agree on both partitions, so the bootstrap ARI of
    # a near-chance clustering sits above the plain ARI.)
    expected = bootstrap_distributions(corpus_labels, clusters, resamples=200, seed=0)
    assert np.array_equal(configuration.distributions["ari"], expected["ari"])
    assert metrics["stability_ari"] == pytest.approx(adjusted_rand_score(clusters[0], clusters[1]), abs=1e-12)
