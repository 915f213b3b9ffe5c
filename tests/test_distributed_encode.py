"""The forward pass and the scoring on a Dask cluster: the same vectors and scores as the local executor, chunk
keys that hold every input of the encode key, and recovery from a worker killed mid-encode."""

from __future__ import annotations

import os

import numpy as np
import pytest

from harness.embed.pooling import POOLINGS
from harness.engine.cache import StageCache
from harness.engine.distributed_encode import chunk_key, encode_on_cluster, vector_chunk_texts
from harness.engine.plan import library_versions, make_stage, pool_stage
from harness.engine.runner import loaded_corpora, prepared_sweep, run_sweep_file
from harness.engine.stages import StageExecutor
from harness.keys import chained_key

from conftest import write_sweep

N_TEXTS = 50
LAYERS = ["last", "second_last", 0, 1]  # the tiny BERT has 3 hidden states: every choice that fits it
TIMINGS = ("encode_seconds", "reduce_seconds", "cluster_seconds")


@pytest.fixture(scope="module")
def cluster_client():
    """A 2-worker LocalCluster of separate processes on 127.0.0.1, as ``--executor dask`` starts."""
    from harness.engine.distributed import dask_client

    client = dask_client(None)
    yield client
    client.close()
    client.cluster_to_close.close()


def _prepared(tmp_path, model_dir, long_texts="truncate", max_length=None):
    limit = f", max_length: {max_length}" if max_length else ""
    sweep = write_sweep(tmp_path, f"""
name: chunks
datasets:
  - {{source: synthetic, n_texts: {N_TEXTS}, n_topics: 3, topic_share: 0.5, seed: 3}}
models:
  - {{name: {model_dir}, long_texts: {long_texts}{limit}, batch_size: 4}}
grid:
  pooling: {sorted(POOLINGS)}
  layers: {LAYERS}
  reduce:
    - {{method: pca, n_components: 2}}
  cluster:
    - {{method: kmeans, k: 3}}
""")
    prepared = prepared_sweep(sweep)
    return prepared, loaded_corpora(prepared)


# Chunk sizes (rounded up to whole batches of 4: 8, 28, 64): ones that do not divide the 50 texts, one larger
# than the corpus; 25 divides the 50 texts of the consecutive chunks the token counts are taken in.
@pytest.mark.parametrize("chunk_size", [7, 25, 64])
@pytest.mark.parametrize("long_texts,max_length", [("truncate", None), ("chunk_mean", 12)])
def test_vectors_from_the_cluster_equal_the_local_ones(tmp_path, tiny_model_dir, cluster_client, chunk_size,
                                                       long_texts, max_length):
    prepared, corpora = _prepared(tmp_path, tiny_model_dir, long_texts, max_length)
    local = StageExecutor(corpora, prepared.trials)
    remote = StageExecutor(corpora, prepared.trials, StageCache(tmp_path / "cache"))
    report = encode_on_cluster(remote, prepared.trials, cluster_client, chunk_size=chunk_size)
    n_chunks = -(-N_TEXTS // vector_chunk_texts(chunk_size, 4))  # whole batches of 4 per chunk
    assert report["chunks_sent"] == n_chunks == remote.work["encode_chunks_from_cluster"]
    assert remote.work["encode_from_cluster"] == 1 and "model_loads" not in remote.work  # nothing loaded here
    # Each of the 2 worker processes loaded this model at most once, however many chunks it encoded (none at all
    # where an earlier case of this module's cluster loaded the same model and max length).
    assert remote.work.get("model_loads_on_cluster", 0) <= 2
    variants = {(t.layers, t.own_stages["pool"].settings["pooling"]) for t in prepared.trials}
    assert len(variants) == len(LAYERS) * len(POOLINGS)  # every pooling x layer choice is compared
    for trial in prepared.trials:
        np.testing.assert_array_equal(remote.token_counts(trial), local.token_counts(trial))
        # The local executor's single pass over all texts is the reference. Batch composition (padding) and the
        # worker's torch threads change float32 summation order, so the tiny model's unnormalised vectors (entries
        # up to about 8) agree to 1e-6 relative (float32 resolution there is about 1e-6 absolute), not bitwise.
        np.testing.assert_allclose(remote.pooled(trial, own=True), local.pooled(trial, own=True), rtol=1e-6, atol=1e-6)
    assert remote.long_text_info(prepared.trials[0]) == local.long_text_info(prepared.trials[0])
    assert remote.work["forward_passes"] == 1 and "forward_passes" in local.work
    # Two single-threaded workers on this host: each chunk task ran torch on half of the cores.
    assert report["task_slots"] == {"tcp://127.0.0.1": 2}
    assert report["torch_threads"] == [max(1, (os.cpu_count() or 1) // 2)]
    assert remote.work["encode_torch_threads_per_worker"] == report["torch_threads"][0]


@pytest.mark.parametrize("slots", [1, 2, 3, 4, 64])
def test_torch_threads_share_the_cores_among_the_task_slots_of_a_host(slots):
    """Outside a worker the host is unknown and the busiest host's slots count: cores // slots, at least 1."""
    from harness.engine.distributed_encode import torch_threads

    assert torch_threads({"tcp://10.0.0.1": slots, "tcp://10.0.0.2": 1}) == max(1, (os.cpu_count() or 1) // slots)


def test_a_chunk_key_holds_every_input_of_the_encode_key_and_the_chunk(tmp_path, tiny_model_dir):
    """Same chunk texts and stage -> same key; any input of the encode key (dataset content, each setting, each
    library version), of a pool variant, or of the chunk (a text, an id, their order) changed -> another key."""
    prepared, _ = _prepared(tmp_path, tiny_model_dir)
    encode = prepared.trials[0].stages["encode"]
    ids, texts = ["a", "b", "c"], ["one text", "another text", "a third"]
    base = chunk_key(encode.key, ids, texts)
    assert chunk_key(make_stage("encode", encode.parent, dict(encode.settings)).key, list(ids), list(texts)) == base
    changed = {"dataset": chunk_key(make_stage("encode", "another-dataset", encode.settings).key, ids, texts)}
    for name, value in encode.settings.items():
        other = dict(encode.settings, **{name: f"{value}-changed" if not isinstance(value, bool) else not value})
        changed[name] = chunk_key(make_stage("encode", encode.parent, other).key, ids, texts)
    for library in library_versions("encode"):  # a library upgrade gives another encode key (make_stage's versions)
        versions = dict(library_versions("encode"), **{library: "0.0-other"})
        stage_key = chained_key("encode", encode.parent, {**encode.settings, "versions": versions})
        changed[f"version of {library}"] = chunk_key(stage_key, ids, texts)
    assert chained_key("encode", encode.parent, {**encode.settings, "versions": library_versions("encode")}) == encode.key
    pool = pool_stage(encode.key, "last", "mean", "float32")
    for name, variant in {"layers": ("second_last", "mean", "float32"), "pooling": ("last", "max", "float32"),
                          "dtype": ("last", "mean", "float16")}.items():
        changed[f"pool {name}"] = chunk_key(pool_stage(encode.key, *variant).key, ids, texts)
    changed["pool chunk of the same texts"] = chunk_key(pool.key, ids, texts)
    changed["a text"] = chunk_key(encode.key, ids, ["one text", "another text!", "a third"])
    changed["an id"] = chunk_key(encode.key, ["a", "b", "d"], texts)
    changed["order"] = chunk_key(encode.key, ids[::-1], texts[::-1])
    changed["one text fewer"] = chunk_key(encode.key, ids[:2], texts[:2])
    assert set(encode.settings) <= set(changed)  # every setting of the encode key was walked
    same = [name for name, key in changed.items() if key == base]
    assert not same, same
    assert len(set(changed.values())) == len(changed)


def _scores_without_timings(result):
    return {r.trial.key: {k: v for k, v in r.scores.items() if k not in TIMINGS} for r in result.results}


def test_a_worker_killed_mid_encode_costs_only_its_chunks(tmp_path, tiny_model_dir):
    """One of a 2-process LocalCluster's workers is killed (SIGKILL) after encoding its second chunk, before the
    chunk's result leaves it. The sweep finishes with the local executor's scores; every chunk is stored once;
    the scheduler ran again only chunks that were on the killed worker."""
    from dask.distributed import LocalCluster

    n_texts, chunk_size = 120, 20
    sweep = write_sweep(tmp_path, f"""
name: killed_worker
datasets:
  - {{source: synthetic, n_texts: {n_texts}, n_topics: 3, topic_share: 0.5, seed: 4}}
models:
  - {{name: {tiny_model_dir}, batch_size: 4}}
grid:
  pooling: [mean, cls]
  reduce:
    - {{method: pca, n_components: 4}}
  cluster:
    - {{method: kmeans, k: labels}}
  seeds: [0, 1]
evidence: {{resamples: 50, permutations: 19}}
""")
    local = run_sweep_file(sweep, tmp_path / "local")
    marker = tmp_path / "killed"
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1", dashboard_address=None,
                      env={"HARNESS_CRASH_AT": "encode_chunk:2", "HARNESS_CRASH_ONCE": str(marker),
                           "OMP_NUM_THREADS": "1"}) as cluster:
        remote = run_sweep_file(sweep, tmp_path / "dask", executor="dask", scheduler=cluster.scheduler_address,
                                chunk_texts=chunk_size)
        # The scheduler's own record of every task transition (distributed's Scheduler.transition_log).
        transitions = [t for t in cluster.scheduler.transition_log if str(t[0]).startswith("harness-encode-chunk-")]
    assert marker.exists()  # a worker did die mid-stage
    assert not remote.failed and not local.failed
    expected = _scores_without_timings(local)
    for key, scores in _scores_without_timings(remote).items():
        assert set(scores) == set(expected[key])
        # Silhouette and DBCV: float32 sums whose order follows the threads (1 on a worker, all cores here);
        # observed up to 1.7e-5 relative on these 120 texts, the clusterings and every other score equal.
        for name, value in scores.items():
            rel = 1e-4 if name in ("silhouette", "dbcv") else None
            assert value == pytest.approx(expected[key][name], nan_ok=True, rel=rel), (key, name)
    # The killed worker's replacement loads the model again: at most one load per worker process.
    assert remote.work["model_loads_on_cluster"] <= 3
    n_chunks = n_texts // chunk_size
    assert remote.work["encode_chunks_from_cluster"] == n_chunks  # each chunk's result arrived once
    kinds = [e.kind for e in StageCache(tmp_path / "dask" / "cache").entries()]
    assert kinds.count("encode_chunk") == n_chunks and kinds.count("pool_chunk") == n_chunks * 2
    runs = {key: sum(1 for k, _, finish, *_ in transitions if k == key and finish == "processing")
            for key in {t[0] for t in transitions}}
    assert len(runs) == n_chunks
    # Lost with the worker: sent back from processing (or from memory, a result not yet fetched) to be run again.
    lost = {k for k, start, finish, *_ in transitions if start in ("processing", "memory")
            and finish in ("released", "waiting", "queued", "no-worker")}
    rerun = {key for key, count in runs.items() if count > 1}
    assert rerun and rerun <= lost  # the killed chunk ran again, and nothing that was not lost did
    assert all(runs[key] == 1 for key in set(runs) - lost)
    assert len(rerun) < n_chunks
