"""The 2-D map of a dataset's winner: computed by the run that found the winner, logged with it, read by the report.

The run has the winner's vectors at hand when it ends; the report, which may run on another machine from a
copy of the store, has only what was logged. So the run reduces the vectors the winner's reducer saw (its
first seed's) to two dimensions, always with the same UMAP settings whatever the winner's own reducer, and
logs the points with what the map draws: each text's id, gold label, cluster and token count, and each
cluster's distinctive terms for the legend. The fit itself is a stage (StageExecutor.map_coordinates: the shared
neighbour graph, then UMAP), cached like any reduction. Pure functions here; the runner logs, the report reads.
"""

from __future__ import annotations

from typing import Any

import numpy as np

# Artifacts of the winner's configuration run, and the tag that says whether they were logged (and if not, why).
MAP_POINTS = "winner_map.parquet"
MAP_INFO = "winner_map.json"
MAP_TAG = "harness.map"
MAP_LOGGED = "logged"
MAP_LEFT_OUT = "left out: the run was started with --no-map"
MAP_SEED = 0  # the map's own seed: the same map whichever seed the winner's first trial ran with
MAP_COLUMNS = ("id", "label", "cluster", "token_count", "x", "y")


def map_settings(n_texts: int):
    """UMAP to 2 dimensions, cosine, at most 15 neighbours (fewer on a corpus too small for 15)."""
    from harness.geometry.reduce import UmapSettings

    return UmapSettings(method="umap", n_components=2, n_neighbors=min(15, n_texts - 1), metric="cosine")


def map_points(ids, labels, clusters: np.ndarray, token_counts: np.ndarray, xy: np.ndarray):
    """One row per text, in corpus order: what a point of the map is and where it lies."""
    import pandas as pd

    n = len(clusters)
    return pd.DataFrame({
        "id": np.asarray(ids).astype(str),
        "label": labels if labels is not None else pd.array([None] * n, dtype="Int64"),
        "cluster": np.asarray(clusters, dtype=np.int64),
        "token_count": np.asarray(token_counts, dtype=np.int64),
        "x": xy[:, 0].astype(np.float32),
        "y": xy[:, 1].astype(np.float32),
    }, columns=list(MAP_COLUMNS))


def map_info(*, dataset: str, configuration: str, seed_run_id: str, trial_key: str, seed: int, n_texts: int,
             descriptions: list[dict]) -> dict[str, Any]:
    """Where the points come from (which run, which seed, which vectors, which settings) and the legend."""
    return {
        "dataset": dataset,
        "configuration": configuration,
        "seed_run_id": seed_run_id,
        "trial_key": trial_key,
        "seed": seed,
        "vectors": "the input of the winner's reducer (after pooling and transforms), from its first seed",
        "reducer": map_settings(n_texts).as_params(),
        "map_seed": MAP_SEED,
        "legend": {str(row["cluster"]): str(row["top_terms"]) for row in descriptions},
    }


def map_failed(error: BaseException) -> str:
    """The tag value of a map that could not be computed: the error's first line."""
    message = f"{type(error).__name__}: {error}".splitlines()[0]
    return f"failed: {message}"
