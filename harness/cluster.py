"""Clusterers: settings models and fit functions. Noise is labelled -1."""

from __future__ import annotations

from typing import Annotated, Callable, Literal, Optional, Union

import numpy as np
from pydantic import Field, PositiveInt

from harness._settings import Settings


class HdbscanSettings(Settings):
    method: Literal["hdbscan"]
    min_cluster_size: int = Field(15, ge=2)
    min_samples: Optional[PositiveInt] = None
    cluster_selection_method: Literal["eom", "leaf"] = "eom"


class KmeansSettings(Settings):
    method: Literal["kmeans"]
    k: Union[Annotated[int, Field(ge=2)], Literal["labels"]] = "labels"
    n_init: PositiveInt = 10


ClustererSettings = Annotated[Union[HdbscanSettings, KmeansSettings], Field(discriminator="method")]


def hdbscan_labels(vectors: np.ndarray, settings: HdbscanSettings, seed: int, n_classes: int | None) -> np.ndarray:
    import hdbscan

    model = hdbscan.HDBSCAN(
        min_cluster_size=settings.min_cluster_size,
        min_samples=settings.min_samples,
        cluster_selection_method=settings.cluster_selection_method,
        core_dist_n_jobs=1,
    )
    return model.fit_predict(vectors.astype(np.float64)).astype(np.int64)


def kmeans_labels(vectors: np.ndarray, settings: KmeansSettings, seed: int, n_classes: int | None) -> np.ndarray:
    from sklearn.cluster import KMeans

    k = resolved_k(settings, n_classes)
    model = KMeans(n_clusters=k, n_init=settings.n_init, random_state=seed)
    return model.fit_predict(vectors).astype(np.int64)


def resolved_k(settings: KmeansSettings, n_classes: int | None) -> int:
    if settings.k != "labels":
        return int(settings.k)
    if n_classes is None:
        raise ValueError("k: labels needs a labelled dataset")
    return n_classes


ClustererFn = Callable[[np.ndarray, Settings, int, Optional[int]], np.ndarray]

CLUSTERERS: dict[str, ClustererFn] = {"hdbscan": hdbscan_labels, "kmeans": kmeans_labels}

# Clusterers whose output depends on the seed.
SEEDED_CLUSTERERS = frozenset({"kmeans"})


def cluster_labels(vectors: np.ndarray, settings: Settings, seed: int, n_classes: int | None) -> np.ndarray:
    """Apply the clusterer named by ``settings.method``."""
    return CLUSTERERS[settings.method](vectors, settings, seed, n_classes)


def clustering_limits(settings: Settings, n_texts: int, n_classes: int | None) -> str | None:
    """Why these settings cannot run on n_texts points, or None if they can."""
    if isinstance(settings, HdbscanSettings) and settings.min_cluster_size > n_texts:
        return f"min_cluster_size={settings.min_cluster_size} exceeds the number of texts ({n_texts})"
    if isinstance(settings, KmeansSettings):
        if settings.k == "labels" and n_classes is None:
            return "k: labels needs a dataset with a label column"
        k = n_classes if settings.k == "labels" else settings.k
        if k is not None and k > n_texts:
            return f"k={k} exceeds the number of texts ({n_texts})"
    return None
