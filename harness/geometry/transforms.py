"""Post-processing of pooled vectors, applied after pooling and before reduction.

Each step is fitted on the corpus being clustered. A transform is a chain of
steps applied in order; the empty chain leaves vectors as they are.
"""

from __future__ import annotations

from typing import Annotated, Any, Callable, Literal, Union, get_args

import numpy as np
from pydantic import BeforeValidator, Field, PositiveInt

from harness._settings import Settings


class CenterStep(Settings):
    method: Literal["center"]


class L2Step(Settings):
    method: Literal["l2"]


class WhitenStep(Settings):
    method: Literal["whiten"]
    k: PositiveInt = 256


class AllButTheTopStep(Settings):
    method: Literal["all_but_the_top"]
    d: PositiveInt = 3


class RemoveLengthStep(Settings):
    method: Literal["remove_length"]


def _step_shorthand(value: Any) -> Any:
    return {"method": value} if isinstance(value, str) else value


_STEPS = (CenterStep, L2Step, WhitenStep, AllButTheTopStep, RemoveLengthStep)
StepName = Literal[tuple(get_args(step.model_fields["method"].annotation)[0] for step in _STEPS)]  # a step by name
TransformStep = Annotated[
    Union[_STEPS],
    Field(discriminator="method"), BeforeValidator(_step_shorthand, json_schema_input_type=Union[(StepName, *_STEPS)]),
]


def centered(vectors: np.ndarray) -> np.ndarray:
    """Subtract the corpus mean."""
    return vectors - vectors.mean(axis=0, keepdims=True)


def l2_normalized(vectors: np.ndarray) -> np.ndarray:
    """Each row scaled to unit Euclidean length; zero rows stay zero."""
    norms = np.linalg.norm(vectors, axis=1, keepdims=True)
    return (vectors / np.where(norms == 0, 1, norms)).astype(vectors.dtype)


def whitened(vectors: np.ndarray, k: int) -> np.ndarray:
    """PCA whitening to k dimensions (Su et al., 2021): (x - mu) U_k diag(1/sqrt(lambda_k)).

    The covariance uses n - 1, as numpy's cov and scikit-learn's PCA do, so the
    output has identity covariance on the fitted data.
    """
    x = vectors.astype(np.float64) - vectors.mean(axis=0, keepdims=True)
    _, singular, components = np.linalg.svd(x, full_matrices=False)
    variances = singular[:k] ** 2 / (x.shape[0] - 1)
    return (x @ components[:k].T / np.sqrt(np.maximum(variances, np.finfo(float).tiny))).astype(np.float32)


def all_but_the_top(vectors: np.ndarray, d: int) -> np.ndarray:
    """Remove the mean and the projections on the top d principal components (Mu & Viswanath, 2018)."""
    x = vectors.astype(np.float64) - vectors.mean(axis=0, keepdims=True)
    _, _, components = np.linalg.svd(x, full_matrices=False)
    top = components[:d]
    return (x - (x @ top.T) @ top).astype(np.float32)


def length_removed(vectors: np.ndarray, lengths: np.ndarray) -> np.ndarray:
    """Project out the direction along which the embedding covaries with log length.

    The direction is b = Xc^T yc, the least-squares slopes of every embedding
    dimension on centred log length. Removing it leaves the orthogonal complement,
    in which every dimension has zero covariance with log length on the fitted
    corpus, so no linear predictor can recover length there. (Projecting out the
    predictor direction, the least-squares weights of length on the embedding, is
    not enough: unless that direction is an eigenvector of the embedding's
    covariance, part of the length signal stays in the complement.)
    """
    x = vectors.astype(np.float64)
    target = np.log(np.maximum(lengths, 1)).astype(np.float64)
    slopes = (x - x.mean(axis=0)).T @ (target - target.mean())
    norm = np.linalg.norm(slopes)
    if norm == 0:
        return vectors
    direction = slopes / norm
    return (x - np.outer(x @ direction, direction)).astype(np.float32)


StepFn = Callable[[np.ndarray, np.ndarray, Settings], np.ndarray]

TRANSFORMS: dict[str, StepFn] = {
    "center": lambda v, lengths, s: centered(v),
    "l2": lambda v, lengths, s: l2_normalized(v),
    "whiten": lambda v, lengths, s: whitened(v, s.k),
    "all_but_the_top": lambda v, lengths, s: all_but_the_top(v, s.d),
    "remove_length": lambda v, lengths, s: length_removed(v, lengths),
}

# Steps after which a positive per-row factor applied before them no longer matters.
SCALE_REMOVING = frozenset({"l2"})

NORMALIZATIONS: dict[str, list] = {"none": [], "l2": [L2Step(method="l2")]}


def transformed(vectors: np.ndarray, lengths: np.ndarray, chain: list[Settings]) -> np.ndarray:
    """Apply a chain of steps in order."""
    for step in chain:
        vectors = TRANSFORMS[step.method](vectors, lengths, step)
    return vectors


def chain_label(chain: list[Settings]) -> str:
    """A short readable name of a chain, e.g. center>remove_length>l2 or whiten64."""
    if not chain:
        return "none"
    parts = []
    for step in chain:
        params = {k: v for k, v in step.as_params().items() if k != "method"}
        parts.append(step.method + "".join(str(v) for v in params.values()))
    return ">".join(parts)


def chain_width(chain: list[Settings], width: int) -> int:
    """Dimensions after the chain (whitening keeps k)."""
    for step in chain:
        if isinstance(step, WhitenStep):
            width = min(width, step.k)
    return width


def transform_limits(chain: list[Settings], n_texts: int, width: int) -> str | None:
    """Why this chain cannot run on n_texts vectors of this width, or None if it can."""
    for step in chain:
        if isinstance(step, WhitenStep) and step.k > min(n_texts, width):
            return f"whiten k={step.k} exceeds min(texts, dimensions)={min(n_texts, width)}"
        if isinstance(step, AllButTheTopStep) and step.d >= min(n_texts, width):
            return f"all_but_the_top d={step.d} must be below min(texts, dimensions)={min(n_texts, width)}"
    return None
