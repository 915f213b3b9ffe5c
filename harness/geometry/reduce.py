"""Dimensionality reducers: settings models and fit functions.

A reducer maps (n, d) float32 vectors to (n, k). Heavy libraries are imported
inside the fit functions so that parsing a sweep stays fast.
"""

from __future__ import annotations

import warnings
from typing import Annotated, Callable, Literal, Union

import numpy as np
from pydantic import Field, PositiveInt

from harness._crashpoints import crash_point
from harness._settings import Settings


class NoReduction(Settings):
    method: Literal["none"]


class PcaSettings(Settings):
    method: Literal["pca"]
    n_components: PositiveInt = 50


class UmapSettings(Settings):
    method: Literal["umap"]
    n_components: PositiveInt = 5
    n_neighbors: int = Field(15, ge=2)
    min_dist: float = Field(0.0, ge=0.0)
    metric: Literal["cosine", "euclidean", "manhattan", "correlation"] = "cosine"


ReducerSettings = Annotated[Union[NoReduction, PcaSettings, UmapSettings], Field(discriminator="method")]


def no_reduction(vectors: np.ndarray, settings: NoReduction, seed: int) -> np.ndarray:
    return vectors


def pca_reduced(vectors: np.ndarray, settings: PcaSettings, seed: int) -> np.ndarray:
    from sklearn.decomposition import PCA

    # Full SVD is deterministic, so the seed does not enter.
    return PCA(n_components=settings.n_components, svd_solver="full").fit_transform(vectors).astype(np.float32)


# Up to this many texts the neighbour graph is exact (brute force, in row blocks); above, approximate
# (pynndescent's NN-descent with a fixed seed), as umap-learn itself does above 4,096 points.
EXACT_NEIGHBOURS_UP_TO = 20_000
GRAPH_SEED = 0  # the approximate graph's seed: fixed, so every seed of a sweep shares one graph


def neighbour_method(n_texts: int) -> str:
    """How the neighbour graph of n_texts vectors is computed: ``exact`` or ``nndescent``."""
    return "exact" if n_texts <= EXACT_NEIGHBOURS_UP_TO else "nndescent"


def neighbour_graph(vectors: np.ndarray, metric: str, n_neighbors: int, method: str) -> np.ndarray:
    """The k-nearest-neighbour graph UMAP builds its fuzzy set from, each point its own first neighbour.

    Returned as one (2, n, k) float64 array, indices then distances (indices are exact in float64), so that it is
    stored like every other stage output. It depends on the vectors, the metric and n_neighbors only: not on the
    seed, n_components or min_dist, so every fit that shares those three shares the graph.
    """
    if method == "exact":
        from sklearn.neighbors import NearestNeighbors
        from threadpoolctl import threadpool_limits

        # One BLAS thread: a multi-threaded product may round differently with the thread count, and a layout
        # is sensitive to the last bit of a distance; the graph must be the same here and on a Dask worker.
        with threadpool_limits(limits=1):
            found = NearestNeighbors(n_neighbors=n_neighbors, metric=metric, algorithm="brute", n_jobs=1).fit(vectors)
            distances, indices = found.kneighbors(vectors)
    elif method == "nndescent":
        from umap.umap_ import nearest_neighbors

        indices, distances, _ = nearest_neighbors(
            vectors, n_neighbors, metric, {}, False, np.random.RandomState(GRAPH_SEED), low_memory=True,
            use_pynndescent=True, n_jobs=1)
    else:
        raise ValueError(f"unknown neighbour method {method!r}")
    return np.stack([indices.astype(np.float64), distances.astype(np.float64)])


def umap_reduced(vectors: np.ndarray, settings: UmapSettings, seed: int, graph: np.ndarray | None = None) -> np.ndarray:
    """UMAP's layout; given ``graph`` (see neighbour_graph), its neighbours are used instead of searched for."""
    import umap

    knn = (None, None, None) if graph is None else (graph[0].astype(np.int64), graph[1].astype(np.float32))
    reducer = umap.UMAP(
        n_components=settings.n_components,
        n_neighbors=settings.n_neighbors,
        min_dist=settings.min_dist,
        metric=settings.metric,
        random_state=seed,
        precomputed_knn=knn,
    )
    crash_point("umap_fit")
    with warnings.catch_warnings():
        # A fixed seed makes UMAP single-threaded; reproducibility is the point here.
        warnings.filterwarnings("ignore", message=".*n_jobs value.*overridden.*")
        # Neighbours handed in carry no search index: only transform() of new points needs it, never used here.
        warnings.filterwarnings("ignore", message=".*knn_search_index.*")
        return reducer.fit_transform(vectors).astype(np.float32)


ReducerFn = Callable[[np.ndarray, Settings, int], np.ndarray]

REDUCERS: dict[str, ReducerFn] = {"none": no_reduction, "pca": pca_reduced, "umap": umap_reduced}

# Reducers whose output depends on the seed; the others share one result across seeds.
SEEDED_REDUCERS = frozenset({"umap"})

# Reducers whose result is unchanged when each row is scaled by a positive factor.
SCALE_INVARIANT_REDUCERS: dict[str, Callable[[Settings], bool]] = {
    "umap": lambda s: s.metric in ("cosine", "correlation"),
}


def reduced(vectors: np.ndarray, settings: Settings, seed: int, graph: np.ndarray | None = None) -> np.ndarray:
    """Apply the reducer named by ``settings.method`` (UMAP on a precomputed neighbour graph when one is given)."""
    if graph is not None:
        return umap_reduced(vectors, settings, seed, graph)
    return REDUCERS[settings.method](vectors, settings, seed)


# Reducers built on a neighbour graph that is computed once per (vectors, metric, n_neighbors) and shared.
GRAPH_REDUCERS = frozenset({"umap"})


def reduction_limits(settings: Settings, n_texts: int, width: int) -> str | None:
    """Why these settings cannot run on n_texts vectors of this width, or None if they can."""
    if isinstance(settings, PcaSettings) and settings.n_components > min(n_texts, width):
        return f"n_components={settings.n_components} exceeds min(texts, dimensions)={min(n_texts, width)}"
    if isinstance(settings, UmapSettings):
        if settings.n_neighbors >= n_texts:
            return f"n_neighbors={settings.n_neighbors} must be below the number of texts ({n_texts})"
        if settings.n_components >= n_texts - 1:
            return f"n_components={settings.n_components} must be below the number of texts minus 1 ({n_texts - 1})"
    return None
