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


def umap_reduced(vectors: np.ndarray, settings: UmapSettings, seed: int) -> np.ndarray:
    import umap

    reducer = umap.UMAP(
        n_components=settings.n_components,
        n_neighbors=settings.n_neighbors,
        min_dist=settings.min_dist,
        metric=settings.metric,
        random_state=seed,
    )
    crash_point("umap_fit")
    with warnings.catch_warnings():
        # A fixed seed makes UMAP single-threaded; reproducibility is the point here.
        warnings.filterwarnings("ignore", message=".*n_jobs value.*overridden.*")
        return reducer.fit_transform(vectors).astype(np.float32)


ReducerFn = Callable[[np.ndarray, Settings, int], np.ndarray]

REDUCERS: dict[str, ReducerFn] = {"none": no_reduction, "pca": pca_reduced, "umap": umap_reduced}

# Reducers whose output depends on the seed; the others share one result across seeds.
SEEDED_REDUCERS = frozenset({"umap"})

# Reducers whose result is unchanged when each row is scaled by a positive factor.
SCALE_INVARIANT_REDUCERS: dict[str, Callable[[Settings], bool]] = {
    "umap": lambda s: s.metric in ("cosine", "correlation"),
}


def reduced(vectors: np.ndarray, settings: Settings, seed: int) -> np.ndarray:
    """Apply the reducer named by ``settings.method``."""
    return REDUCERS[settings.method](vectors, settings, seed)


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
