"""The forward pass on a Dask cluster: the texts in chunks, one task per chunk, each chunk stored on its own.

Token counts are taken in chunks of consecutive texts; the vectors then in chunks of the texts sorted by length
over the whole corpus, whole batches each, so that every batch is the one a local pass (``pooled_variants``)
makes and the vectors equal the local ones. Each chunk's counts or pooled variants come back to the submitting process,
which stores them as cache entries of their own (kinds ``encode_chunk`` and ``pool_chunk``) as soon as they
arrive, so a worker that dies costs only the chunks it held; the stage's outputs are then assembled in the
texts' order and handed to the executor as if computed here.

Each worker process loads a model once and keeps it for the chunks it gets, in a module-level dict keyed by
the model's identity. A distributed Actor would also hold a model, but it lives on one worker: chunks sent
to it queue there rather than spread over the cluster, one actor per worker would have to be placed by
hand, and an actor lost with its worker is not recreated (its calls fail), whereas a plain task whose
worker dies is rescheduled by the scheduler on another, which finds or loads its own copy.

Torch threads: each chunk task sets ``torch.set_num_threads(cores // task slots on its host)``, so the
workers of one machine share its cores instead of each assuming all of them.
"""

from __future__ import annotations

import hashlib
import os
import time
from collections import Counter
from typing import Optional

import numpy as np

from harness._crashpoints import crash_point
from harness.engine.plan import Trial
from harness.keys import canonical_json, chained_key, texts_digest

CHUNK_TEXTS = 512  # texts per task: long enough to fill a few batches, short enough that a lost one costs little
CLUSTER_FAMILIES = ("sentence_transformer", "transformer")  # word vectors, TF-IDF and files stay local

_ENCODERS: dict[tuple, object] = {}  # on a worker process: model identity -> the loaded model
_WORKER_WORK: Counter = Counter()  # on a worker process: models loaded, chunks encoded


# -- keys (pure) -----------------------------------------------------------------------------------------------
def chunk_bounds(n_texts: int, chunk_size: int) -> list[tuple[int, int]]:
    """[start, stop) of each chunk of consecutive texts; the last may be shorter."""
    if chunk_size < 1:
        raise ValueError(f"chunk_size must be a positive number of texts; got {chunk_size}")
    return [(start, min(start + chunk_size, n_texts)) for start in range(0, n_texts, chunk_size)]


def chunk_identity(ids: list, texts: list[str]) -> dict:
    """What a chunk's output depends on beyond its stage: its texts (content, in order) and their ids."""
    ids_digest = hashlib.sha256(canonical_json([str(i) for i in ids]).encode()).hexdigest()
    return {"ids": ids_digest, "texts": texts_digest(list(texts), None), "n_texts": len(texts)}


def chunk_key(stage_key: str, ids: list, texts: list[str]) -> str:
    """Key of one chunk of a stage: the stage's key (for counts the encode key, for vectors a pool key, which
    holds the encode key) chained with the chunk's ids and texts."""
    return chained_key("chunk", stage_key, chunk_identity(ids, texts))


# -- on a worker -----------------------------------------------------------------------------------------------
def _worker_encoder(model, max_length: Optional[int], trust_remote_code: bool):
    from harness.embed.models import loaded_encoder

    identity = (str(model.folder), model.family, model.weights_digest, max_length, trust_remote_code, model.device.name)
    if identity not in _ENCODERS:
        _ENCODERS[identity] = loaded_encoder(model, max_length, trust_remote_code)
        _WORKER_WORK["model_loads"] += 1
        _WORKER_WORK["just_loaded"] = 1
    return _ENCODERS[identity]


def torch_threads(slots_per_host: dict[str, int]) -> int:
    """This process's share of its machine's cores: cores // task slots on this host (at least 1)."""
    host = "local"
    try:
        from distributed import get_worker

        host = get_worker().address.rsplit(":", 1)[0]
    except (ImportError, ValueError):
        pass
    slots = slots_per_host.get(host) or max(slots_per_host.values(), default=1)
    return max(1, (os.cpu_count() or 1) // max(1, slots))


def encoded_chunk(model, max_length: Optional[int], trust_remote_code: bool, texts: list[str], variants: list,
                  batch_size: int, long_texts: str, slots_per_host: dict[str, int]) -> dict:
    """One task: token counts and every pooled variant of a chunk of texts (length-sorted within the chunk)."""
    import torch

    from harness.embed.encode import counts_of, pooled_variants, token_ids

    torch.set_num_threads(torch_threads(slots_per_host))
    _WORKER_WORK["just_loaded"] = 0
    encoder = _worker_encoder(model, max_length, trust_remote_code)
    loaded = _WORKER_WORK["just_loaded"]  # whether this chunk paid for loading the model on this worker
    started = time.perf_counter()
    ids = token_ids(encoder, texts)
    pooled = pooled_variants(encoder, texts, variants, batch_size=batch_size, counts=counts_of(ids), ids=ids,
                             long_texts=long_texts)
    _WORKER_WORK["chunks"] += 1
    crash_point("encode_chunk")  # after the work, before the result leaves: the worst moment to lose a worker
    return {"arrays": [pooled[tuple(v)] for v in variants], "seconds": time.perf_counter() - started,
            "worker": os.getpid(), "worker_model_loads": _WORKER_WORK["model_loads"], "model_loaded": loaded,
            "threads": torch.get_num_threads()}


def encode_summary(model, max_length: Optional[int], trust_remote_code: bool, counts: np.ndarray, long_texts: str) -> dict:
    """One task: what happened to long texts (``encode.long_text_info``), from all counts and the worker's model."""
    from harness.embed.encode import long_text_info

    return long_text_info(counts, _worker_encoder(model, max_length, trust_remote_code), long_texts)


# -- on the submitter ------------------------------------------------------------------------------------------
def task_slots_per_host(client) -> dict[str, int]:
    """Threads Dask may run at once on each host (the sum of its workers' threads)."""
    slots: Counter = Counter()
    for address, worker in client.scheduler_info(n_workers=-1)["workers"].items():
        slots[address.rsplit(":", 1)[0]] += int(worker.get("nthreads", 1))
    return dict(slots)


def _stored_chunk(executor, keys: list[tuple[str, str]]) -> Optional[list[np.ndarray]]:
    if executor.cache is None:
        return None
    arrays = []
    for kind, key in keys:
        found = executor.cache.get(kind, key)
        if found is None:
            return None
        arrays.append(np.asarray(found[0]))
    return arrays


def vector_chunk_texts(chunk_size: int, batch_size: int) -> int:
    """Texts per vector chunk: ``chunk_size`` rounded up to whole batches."""
    return -(-max(1, chunk_size) // batch_size) * batch_size


def chunk_token_counts(model, max_length: Optional[int], trust_remote_code: bool, texts: list[str]) -> dict:
    """One task: the token counts of a chunk of texts under the model's tokenizer."""
    from harness.embed.encode import token_counts

    _WORKER_WORK["just_loaded"] = 0
    encoder = _worker_encoder(model, max_length, trust_remote_code)
    return {"arrays": [token_counts(encoder, texts)], "model_loaded": _WORKER_WORK["just_loaded"], "seconds": 0.0,
            "threads": None}


def _chunked(executor, client, report: dict, groups: list[np.ndarray], corpus, keys_of, submit, name: str):
    """Each group of texts' arrays, from the cache or from a task (stored as it arrives), in the groups' order;
    None when a task is lost for good."""
    from dask.distributed import as_completed

    found, futures = {}, {}
    for index, group in enumerate(groups):
        ids, texts = [corpus.ids[i] for i in group], [corpus.texts[i] for i in group]
        keys = keys_of(ids, texts)
        stored = _stored_chunk(executor, keys)
        if stored is not None:
            found[index] = stored
            executor.work[f"{name}_chunk_cache_hits"] += 1
            continue
        futures[submit(texts, f"harness-{name}-chunk-{keys[0][1]}")] = (index, keys)
    failed = False
    for future in as_completed(list(futures)):
        index, keys = futures.pop(future)
        try:
            result = future.result()
        except Exception:  # a chunk lost for good: this encode key is computed here when a trial needs it
            failed = True
            executor.work[f"{name}_chunks_failed_on_cluster"] += 1
            continue
        if executor.cache is not None:  # stored as it arrives: a later loss costs only the chunks not yet here
            for (kind, key), array in zip(keys, result["arrays"]):
                executor.cache.put(kind, key, array, {"seconds": result["seconds"], "computed_on": "dask",
                                                      "torch_threads": result["threads"]})
        found[index] = result["arrays"]
        executor.work["model_loads_on_cluster"] += result["model_loaded"]
        executor.work[f"{name}_chunks_from_cluster"] += 1
        if result["threads"] is not None:
            report["torch_threads"].add(result["threads"])
            report["chunks_sent"] += 1
        future.release()
    return None if failed else [found[i] for i in range(len(groups))]


def encode_on_cluster(executor, trials: list[Trial], client, chunk_size: int = CHUNK_TEXTS) -> dict:
    """Encode, on the cluster, every transformer encode key the trials need that is not stored yet.

    Returns what was done: vector chunks sent, the torch threads the chunk tasks ran
    with, and the task slots per host they were derived from.
    A chunk that fails on the cluster leaves its encode key to the submitting process, which computes it (or
    fails the trials that need it, as it would locally) when a trial asks for it.
    """
    slots = task_slots_per_host(client)
    report = {"chunks_sent": 0, "torch_threads": set(), "task_slots": slots}
    firsts: dict[str, Trial] = {}
    for trial in trials:
        if trial.model.family in CLUSTER_FAMILIES and trial.model.backend == "torch":
            firsts.setdefault(trial.stages["encode"].key, trial)
    for encode_key, first in firsts.items():
        wanted = executor.wanted_pools(first)
        missing = [v for v, key in wanted.items() if not executor.holds("pool", key)]
        if not missing and executor.holds("encode", encode_key):
            continue
        variants = sorted(wanted, key=str)  # every variant: one pass gives them all, and the chunk keys are stable
        corpus = executor.corpora[first.dataset]
        spec = first.model
        started = time.perf_counter()
        model_args = (first.resolved_model, spec.max_length, spec.trust_remote_code)
        # First the token counts, in chunks of consecutive texts; then the vectors, in chunks of the texts sorted
        # by length over the whole corpus, as many whole batches each: every batch is then the one a local pass
        # makes, so the vectors are the local ones (padding and batch shape change float rounding otherwise).
        if executor.holds("encode", encode_key):
            counts = executor.token_counts(first)
        else:
            bounds = chunk_bounds(corpus.n_texts, chunk_size)
            pieces = _chunked(executor, client, report, [np.arange(a, b) for a, b in bounds], corpus,
                              lambda ids, texts: [("encode_chunk", chunk_key(encode_key, ids, texts))],
                              lambda texts, key: client.submit(chunk_token_counts, *model_args, texts, key=key), "count")
            if pieces is None:
                continue
            counts = np.concatenate([p[0] for p in pieces])
        order = np.argsort(-counts, kind="stable")
        size = vector_chunk_texts(chunk_size, spec.batch_size)
        groups = [order[start:start + size] for start in range(0, order.size, size)]
        pieces = _chunked(executor, client, report, groups, corpus,
                          lambda ids, texts: [("pool_chunk", chunk_key(wanted[v], ids, texts)) for v in variants],
                          lambda texts, key: client.submit(encoded_chunk, *model_args, texts, variants, spec.batch_size,
                                                           spec.long_texts, slots, key=key), "encode")
        if pieces is None:
            continue
        pooled = {}
        for i, variant in enumerate(variants):
            pooled[variant] = np.empty((corpus.n_texts, pieces[0][i].shape[1]), dtype=pieces[0][i].dtype)
            for group, piece in zip(groups, pieces):
                pooled[variant][group] = piece[i]
        summary = client.submit(encode_summary, first.resolved_model, spec.max_length, spec.trust_remote_code, counts,
                                spec.long_texts, pure=False).result()
        executor.adopt_encoding(first, counts, summary, pooled, time.perf_counter() - started, computed_on="dask")
    if report["torch_threads"]:  # logged with the sweep's work counters (the fewest, where hosts differ)
        executor.work["encode_torch_threads_per_worker"] = min(report["torch_threads"])
    report["torch_threads"] = sorted(report["torch_threads"])
    return report
