"""Running the independent stages of a sweep on a Dask distributed cluster.

The forward pass runs first, in chunks (``harness.engine.distributed_encode``). Every
reduction, with the clusterings downstream of it, is then one task; the results
come back into the executor, which stores them in the cache as if computed here.
Scoring follows (``harness.engine.distributed_scores``); MLflow logging stays here.
A LocalCluster binds to 127.0.0.1; an existing cluster is reached by address.
"""

from __future__ import annotations

import time
from typing import Optional

import numpy as np

from harness.engine.plan import Trial

LOCAL_WORKERS = 2


def graph_task(pooled: np.ndarray, counts: np.ndarray, steps: list, settings: dict) -> dict:
    """One task: transform, then the neighbour graph (harness.geometry.reduce.neighbour_graph, as the local executor
    computes it), once per graph key; every UMAP fit that shares it starts from it. Pure; runs on a worker.
    Returns {"graph": (array, seconds)}, or {"failed": {stage kind: error}}."""
    import joblib

    from harness.geometry.reduce import neighbour_graph
    from harness.geometry.transforms import transformed

    with joblib.parallel_config(backend="sequential"):
        try:
            vectors = transformed(pooled, counts, steps)
        except Exception as err:
            return {"failed": {"transformed": _with_remote_traceback(err)}}
        started = time.perf_counter()
        try:
            graph = neighbour_graph(vectors, settings["metric"], settings["n_neighbors"], settings["method"])
        except Exception as err:
            return {"failed": {"graph": _with_remote_traceback(err)}}
    return {"graph": (graph, time.perf_counter() - started)}


def reduce_and_cluster(pooled: np.ndarray, counts: np.ndarray, steps: list, reducer, seed: int,
                       clusterings: list[tuple[str, object, int]], n_classes: Optional[int],
                       shared_graph: Optional[dict] = None) -> dict:
    """One task: transform, reduce, then every clustering of that reduction. Pure; runs on a worker.

    ``shared_graph`` (a ``graph_task`` result, or the stored graph as {"graph": (array, seconds)}) makes the
    reduction start from that neighbour graph, so a layout is the same wherever it is fitted.
    A stage that raises does not fail the task: its error comes back under ``failed`` (stage kind -> error,
    clusterings by key), so that each trial that needs it fails alone, as with the local executor.
    """
    import joblib

    from harness.geometry.cluster import cluster_labels
    from harness.geometry.reduce import reduced
    from harness.geometry.transforms import transformed

    result: dict = {"clusters": {}, "failed": {}, "cluster_failed": {}}
    if shared_graph is not None and "failed" in shared_graph:  # the graph (or the transform before it) raised
        result["failed"].update({kind if kind == "transformed" else "reduced": err
                                 for kind, err in shared_graph["failed"].items()})
        return result
    graph = None if shared_graph is None else shared_graph["graph"][0]
    # Nested joblib calls inside a task would otherwise be sent back to the cluster (ENVIRONMENT.md).
    with joblib.parallel_config(backend="sequential"):
        for kind, compute in (("transformed", lambda: transformed(pooled, counts, steps)),
                              ("reduced", lambda: reduced(result["transformed"][0], reducer, seed, graph))):
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
    futures, graphs = {}, {}  # graphs: graph key -> (the trial it is adopted for, a future or the stored graph)
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
        shared = None
        if "graph" in first.stages:  # one graph task per graph key, shared by every fit (seed, n_components, min_dist)
            graph_key = first.stages["graph"].key
            if graph_key not in graphs:
                graphs[graph_key] = (first, {"graph": (executor.neighbour_graph(first), 0.0)}
                                     if executor.holds("graph", graph_key) else
                                     client.submit(graph_task, pooled, counts, first.steps, first.stages["graph"].settings,
                                                   pure=False))
            shared = graphs[graph_key][1]
        futures[key] = (members, client.submit(reduce_and_cluster, pooled, counts, first.steps, first.reducer, first.seed,
                                               clusterings, n_classes, shared, pure=False))
    for graph_key, (first, graph) in graphs.items():
        if isinstance(graph, dict):  # stored already
            continue
        try:
            found = graph.result()
        except Exception:  # lost: the reduce tasks that needed it fail with the same loss, and say so
            continue
        if "graph" in found:
            executor.adopt(first, "graph", *found["graph"], counter="neighbour_graphs")
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
