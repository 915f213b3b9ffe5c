"""Clusterers: settings models and fit functions. Noise is labelled -1."""

from __future__ import annotations

from typing import Annotated, Any, Callable, Literal, Optional, Union

import numpy as np
from pydantic import Field, PositiveInt, model_validator

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


class AgglomerativeSettings(Settings):
    """Bottom-up merging (scikit-learn's AgglomerativeClustering), cut at ``k`` clusters or at ``distance_threshold``."""

    method: Literal["agglomerative"]
    linkage: Literal["ward", "average", "complete", "single"] = "ward"
    metric: Literal["euclidean", "cosine"] = "euclidean"
    k: Union[Annotated[int, Field(ge=2)], Literal["labels"], None] = None  # default "labels" when no threshold is given
    distance_threshold: Optional[float] = Field(None, gt=0.0)

    @model_validator(mode="before")
    @classmethod
    def _k_or_threshold(cls, data: Any) -> Any:
        if isinstance(data, dict):
            if data.get("k") is not None and data.get("distance_threshold") is not None:
                raise ValueError("give k or distance_threshold, not both: the tree is cut at a number of clusters or "
                                 "at a merge distance")
            if data.get("distance_threshold") is None and data.get("k") is None:
                data = {**data, "k": "labels"}
        return data

    @model_validator(mode="after")
    def _ward_needs_euclidean(self) -> "AgglomerativeSettings":
        if self.linkage == "ward" and self.metric != "euclidean":
            raise ValueError(f"linkage ward needs metric euclidean (it merges the pair that least increases the "
                             f"within-cluster sum of squares, a Euclidean quantity); got {self.metric}")
        return self


ClustererSettings = Annotated[Union[HdbscanSettings, KmeansSettings, AgglomerativeSettings], Field(discriminator="method")]


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


def agglomerative_labels(vectors: np.ndarray, settings: AgglomerativeSettings, seed: int,
                         n_classes: int | None) -> np.ndarray:
    """scikit-learn's AgglomerativeClustering; deterministic, so the seed is not used."""
    from sklearn.cluster import AgglomerativeClustering

    k = None if settings.distance_threshold is not None else resolved_k(settings, n_classes)
    model = AgglomerativeClustering(n_clusters=k, distance_threshold=settings.distance_threshold,
                                    linkage=settings.linkage, metric=settings.metric)
    return model.fit_predict(vectors).astype(np.int64)


def resolved_k(settings: KmeansSettings | AgglomerativeSettings, n_classes: int | None) -> int:
    if settings.k != "labels":
        return int(settings.k)
    if n_classes is None:
        raise ValueError("k: labels needs a labelled dataset")
    return n_classes


ClustererFn = Callable[[np.ndarray, Settings, int, Optional[int]], np.ndarray]

CLUSTERERS: dict[str, ClustererFn] = {"hdbscan": hdbscan_labels, "kmeans": kmeans_labels,
                                      "agglomerative": agglomerative_labels}

# Clusterers whose output depends on the seed; the others (hdbscan, agglomerative) share one result across seeds.
SEEDED_CLUSTERERS = frozenset({"kmeans"})

# Agglomerative clustering with ward, average or complete linkage keeps every pairwise distance: peak memory was
# measured at about 8 n^2 bytes (0.77 GB at 10,000 texts; see README). Single linkage builds a spanning tree instead,
# in memory linear in n, and has no such limit.
AGGLOMERATIVE_MAX_TEXTS = 20_000
AGGLOMERATIVE_BYTES_PER_PAIR = 8


def cluster_labels(vectors: np.ndarray, settings: Settings, seed: int, n_classes: int | None) -> np.ndarray:
    """Apply the clusterer named by ``settings.method``."""
    return CLUSTERERS[settings.method](vectors, settings, seed, n_classes)


def clustering_limits(settings: Settings, n_texts: int, n_classes: int | None) -> str | None:
    """Why these settings cannot run on n_texts points, or None if they can."""
    if isinstance(settings, HdbscanSettings) and settings.min_cluster_size > n_texts:
        return f"min_cluster_size={settings.min_cluster_size} exceeds the number of texts ({n_texts})"
    if isinstance(settings, AgglomerativeSettings) and settings.linkage != "single" and n_texts > AGGLOMERATIVE_MAX_TEXTS:
        needed = AGGLOMERATIVE_BYTES_PER_PAIR * n_texts**2 / 1e9
        return (f"agglomerative clustering with linkage {settings.linkage} keeps every pairwise distance: {n_texts} texts "
                f"need about {needed:.1f} GB, and it is offered up to {AGGLOMERATIVE_MAX_TEXTS} texts; sample the dataset, "
                f"use linkage single, or kmeans or hdbscan")
    if isinstance(settings, (KmeansSettings, AgglomerativeSettings)) and settings.k is not None:
        if settings.k == "labels" and n_classes is None:
            return "k: labels needs a dataset with a label column"
        k = n_classes if settings.k == "labels" else settings.k
        if k is not None and k > n_texts:
            return f"k={k} exceeds the number of texts ({n_texts})"
    return None
