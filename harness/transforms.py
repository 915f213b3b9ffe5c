"""Post-processing of pooled vectors, applied before reduction."""

from __future__ import annotations

from typing import Callable

import numpy as np


def unchanged(vectors: np.ndarray) -> np.ndarray:
    return vectors


def l2_normalized(vectors: np.ndarray) -> np.ndarray:
    """Each row scaled to unit Euclidean length; zero rows stay zero."""
    norms = np.linalg.norm(vectors, axis=1, keepdims=True)
    return (vectors / np.where(norms == 0, 1, norms)).astype(vectors.dtype)


NORMALIZATIONS: dict[str, Callable[[np.ndarray], np.ndarray]] = {"none": unchanged, "l2": l2_normalized}

# Normalisations after which a positive per-row factor before them no longer matters.
SCALE_REMOVING = frozenset({"l2"})
