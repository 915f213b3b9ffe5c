"""Running the independent stages of a sweep on a Dask distributed cluster.

The forward pass runs first, in chunks (``harness.distributed_encode``). Every
reduction, with the clusterings downstream of it, is then one task; the results
come back into the executor, which stores them in the cache as if computed here.
Scoring follows (``harness.distributed_scores``); MLflow logging stays here.
A LocalCluster binds to 127.0.0.1; an existing cluster is reached by address.
"""

from __future__ import annotations

import time
from typing import Optional

import numpy as np

from harness.plan import Trial

LOCAL_WORKERS = 2


def reduce_and_cluster(pooled: np.ndarray, counts: np.ndarray, steps: list, reducer, seed: int,
                       clusterings: list[tuple[str, object, int]], n_classes: Optional[int],
                       graph: Optional[dict] = None) -> dict:
    """One task: transform, reduce, then every clustering of that reduction. Pure; runs on a worker.

    ``graph`` (a graph stage's settings) makes the reduction start from that neighbour graph, computed here as
    the local executor computes it, so a layout is the same wherever it is fitted.
    A stage that raises does not fail the task: its error comes back under ``failed`` (stage kind -> error,
    clusterings by key), so that each trial that needs it fails alone, as with the local executor.
    """
    import joblib

    from harness.cluster import cluster_labels
    from harness.reduce import neighbour_graph, reduced
    from harness.transforms import transformed

    result: dict = {"clusters": {}, "failed": {}, "cluster_failed": {}}
    # Nested joblib calls inside a task would otherwise be sent back to the cluster (ENVIRONMENT.md).
    with joblib.parallel_config(backend="sequential"):
        for kind, compute in (("transformed", lambda: transformed(pooled, counts, steps)),
                              ("reduced", lambda: reduced(result["transformed"][0], reducer, seed, None if graph is None
                                                          else neighbour_graph(result["transformed"][0], **graph)))):
            started = time.perf_counter()
            try:
                result[kind] = (compute(), time.perf_counter() - started)
            except Exception as err:  # the trial that needs this stage fails with this error
                result["failed"][kind] = _with_remote_traceback(err)
                return result
        points = result["reduced"][0]
        for key, clusterer, cluster_seed in clusterings:
            started = time.perf_counter()
            try:
                result["clusters"][key] = (cluster_labels(points, clusterer, cluster_seed, n_classes), time.perf_counter() - started)
            except Exception as err:
                result["cluster_failed"][key] = _with_remote_traceback(err)
    return result


def _with_remote_traceback(error: Exception) -> Exception:
    """The error, with the worker's traceback kept as a note (tracebacks do not travel back with results)."""
    import traceback

    error.add_note("raised on a Dask worker:\n" + "".join(traceback.format_exception(error)).rstrip())
    return error


def dask_client(scheduler: Optional[str], workers: int = LOCAL_WORKERS):
    """A client of the cluster at ``scheduler``, or of a new LocalCluster on 127.0.0.1 (closed with the client)."""
    from dask.distributed import Client, LocalCluster

    if scheduler:
        return Client(scheduler)
    cluster = LocalCluster(n_workers=workers, threads_per_worker=1, host="127.0.0.1", dashboard_address=None,
                           env={"NUMBA_NUM_THREADS": "1", "OMP_NUM_THREADS": "1"})
    client = Client(cluster)
    client.cluster_to_close = cluster
    return client


def precompute_on_cluster(executor, trials: list[Trial], client) -> int:
    """Compute, on the cluster, every reduction (and its clusterings) the trials need that is not stored yet.

    Returns the number of tasks sent.
    """
    groups: dict[str, list[Trial]] = {}
    for trial in trials:
        groups.setdefault(trial.stages["reduce"].key, []).append(trial)
    futures = {}
    for key, members in groups.items():
        first = members[0]
        if executor.holds("reduce", key) and all(executor.holds("cluster", t.stages["cluster"].key) for t in members):
            continue
        try:
            pooled, counts = executor.pooled(first), executor.token_counts(first)  # encoded here, once per encode key
        except Exception as err:  # as locally: the trials that need these vectors fail, the others go on
            executor.refuse(first, "transform", err)
            continue
        clusterings = list({t.stages["cluster"].key: (t.stages["cluster"].key, t.clusterer, t.seed) for t in members}.values())
        n_classes = executor.corpora[first.dataset].n_classes
        futures[key] = (members, client.submit(reduce_and_cluster, pooled, counts, first.steps, first.reducer, first.seed,
                                               clusterings, n_classes, first.stages["graph"].settings
                                               if "graph" in first.stages else None, pure=False))
    for key, (members, future) in futures.items():
        first = members[0]
        try:
            result = future.result()
        except Exception as err:  # the task itself was lost (a worker died, the cluster went away)
            executor.refuse(first, "reduce", err)
            continue
        stages = (("transform", "transformed", "transforms"), ("reduce", "reduced", f"{first.reducer.method}_fits"))
        for kind, name, counter in stages:
            if name in result["failed"]:
                executor.refuse(first, kind, result["failed"][name])
                break
            executor.adopt(first, kind, *result[name], counter=counter)
        for trial in members:
            cluster_key = trial.stages["cluster"].key
            if cluster_key in result["cluster_failed"]:
                executor.refuse(trial, "cluster", result["cluster_failed"][cluster_key])
            elif cluster_key in result["clusters"] and not executor.holds("cluster", cluster_key):
                executor.adopt(trial, "cluster", *result["clusters"].pop(cluster_key), counter="clusterings")
    return len(futures)
