"""Scoring on a Dask cluster: each trial's scores and cluster descriptions, and each configuration's bootstrap.

The arrays a trial is scored from (its clusters, token counts, own pooled and transformed vectors, reduced
points) are taken from the executor here, sent once per stage key, and scored by the same functions as
``runner.run_trial``; the results come back to the submitting process, which alone logs to MLflow.
A score that raises on a worker comes back as its error, so the trial fails alone, as it would locally.
"""

from __future__ import annotations

from typing import Optional

import numpy as np

from harness.engine.distributed import _with_remote_traceback
from harness.engine.plan import Trial

LEAKAGE_SEED = 0  # as StageExecutor.length_leakage's default


def leakage(vectors: np.ndarray, counts: np.ndarray) -> float:
    """One task: the cross-validated R^2 of log length from these vectors (``metrics.length_leakage_r2``)."""
    from harness.metrics import length_leakage_r2

    return length_leakage_r2(vectors, np.maximum(counts, 1), seed=LEAKAGE_SEED)


def scored_trial(clusters: np.ndarray, counts: np.ndarray, labels: Optional[np.ndarray], own_pooled: np.ndarray,
                 reduced: np.ndarray, leakage_transformed: float, leakage_pooled: float, terms, *, seed: int,
                 permutations: int, max_points: int, top_terms: int):
    """One task: the scores and description table of one clustering, in ``runner.run_trial``'s order, or the
    error a score raised."""
    import joblib

    from harness.metrics._internal import DISTANCES_KEPT_UP_TO, cosine_distances, silhouette_cosine
    from harness.score.scoring import VECTOR_SCORES, described_clusters, label_free_scores, trial_scores

    try:
        with joblib.parallel_config(backend="sequential"):  # nested joblib calls stay on this worker
            scores = trial_scores(clusters, counts, labels)
            # The functions StageExecutor.label_free_score caches locally, on the same vectors and seed, with the
            # same arithmetic (the silhouette from the block of all the vectors' distances, up to the same size).
            held = cosine_distances(own_pooled) if clusters.size <= DISTANCES_KEPT_UP_TO else None
            vector_scores = {
                "silhouette": float(silhouette_cosine(own_pooled, clusters, max_points=max_points, seed=seed,
                                                      distances=held)),
                "dbcv": float(VECTOR_SCORES["dbcv"](reduced, clusters, max_points=max_points, seed=seed)),
            }
            scores.update(label_free_scores(clusters, counts, vector_scores, seed=seed, permutations=permutations))
            scores["length_leakage_r2"] = leakage_transformed
            scores["length_leakage_r2_pooled"] = leakage_pooled
            table, scores["npmi_mean"] = described_clusters(terms, clusters, counts, top=top_terms)
    except Exception as err:  # the trial fails with this error, as locally
        return _with_remote_traceback(err)
    return scores, table


def score_on_cluster(executor, trials: list[Trial], evidence, client) -> dict[str, object]:
    """Scores and description table of every trial, computed on the cluster, by trial key; a trial whose stages
    or scores raised maps to the error, which ``run_trial`` raises."""
    scattered: dict[tuple, object] = {}

    def sent(name: tuple, compute):
        if name not in scattered:
            scattered[name] = client.scatter(compute(), hash=False)
        return scattered[name]

    leakages: dict[tuple, object] = {}
    futures, found = {}, {}
    for trial in trials:
        try:
            clusters = executor.clustered(trial)
            counts = sent(("counts", trial.stages["encode"].key), lambda: executor.token_counts(trial))
            own_pool, own_transform = trial.own_stages["pool"].key, trial.own_stages["transform"].key
            pooled = sent(("pool", own_pool), lambda: executor.pooled(trial, own=True))
            transformed = sent(("transform", own_transform), lambda: executor.transformed(trial, own=True))
            reduced = sent(("reduce", trial.stages["reduce"].key), lambda: executor.reduced(trial))
            terms = sent(("terms", trial.dataset), lambda: executor.term_counts(trial))
        except Exception as err:  # a stage the trial needs raised: the trial fails with it
            found[trial.key] = err
            continue
        for name, vectors in (("transform", transformed), ("pool", pooled)):
            key = (name, own_transform if name == "transform" else own_pool)
            if key not in leakages:
                leakages[key] = client.submit(leakage, vectors, counts, pure=False)
        futures[trial.key] = client.submit(
            scored_trial, clusters, counts, executor.corpora[trial.dataset].labels, pooled, reduced,
            leakages[("transform", own_transform)], leakages[("pool", own_pool)], terms, seed=trial.seed,
            permutations=evidence.permutations, max_points=evidence.max_points, top_terms=evidence.top_terms, pure=False)
    for key, future in futures.items():
        try:
            found[key] = future.result()
        except Exception as err:  # the task was lost, or its leakage input raised
            found[key] = err
        executor.work["scores_from_cluster"] += not isinstance(found[key], BaseException)
    return found


def evidence_on_cluster(client):
    """``evidence.configuration_evidence`` run as a task: a drop-in for the runner's call."""
    from harness.score.evidence import configuration_evidence

    def on_cluster(*args, **kwargs):
        return client.submit(configuration_evidence, *args, **kwargs, pure=False).result()

    return on_cluster
