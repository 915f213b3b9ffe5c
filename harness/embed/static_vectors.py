"""Sentence vectors from static word vectors: averaged, max-pooled or sqrt-length-scaled word vectors, with
optional smooth inverse frequency weighting and first-component removal (Arora, Liang & Ma, 2017)."""

from __future__ import annotations

import re
from collections import Counter
from dataclasses import dataclass

import numpy as np

TOKEN = re.compile(r"\w+|[^\w\s]")
STATIC_POOLINGS = ("mean", "max", "mean_sqrt_len")


@dataclass(frozen=True)
class WordVectors:
    vectors: np.ndarray  # (vocabulary, dim), read-only memory map
    index: dict[str, int]

    @property
    def width(self) -> int:
        return int(self.vectors.shape[1])


def tokens(text: str) -> list[str]:
    """Lower-cased words and punctuation marks, as GloVe's vocabulary has them."""
    return TOKEN.findall(text.lower())


def sif_weights(counts: Counter, a: float) -> dict[str, float]:
    """Smooth inverse frequency: a / (a + p(w)), with p(w) the word's share of all tokens counted (Arora et al. 2017)."""
    total = sum(counts.values())
    return {word: a / (a + count / total) for word, count in counts.items()}


def first_component_removed(matrix: np.ndarray) -> np.ndarray:
    """Remove each row's projection on the first right singular vector of the matrix (Arora et al. 2017, step 2)."""
    _, _, components = np.linalg.svd(matrix.astype(np.float64), full_matrices=False)
    u = components[0]
    return (matrix - np.outer(matrix @ u, u)).astype(np.float32)


def static_pooled(words: WordVectors, texts: list[str], poolings: list[str], *, sif_a: float | None,
                  remove_first_component: bool) -> tuple[dict[str, np.ndarray], float]:
    """Pooled word vectors per pooling, and the share of tokens out of the vocabulary.

    With ``sif_a`` the words are weighted by a / (a + p(w)) before pooling, p(w) counted
    on these texts. A text with no known word gets a zero vector.
    """
    tokenised = [tokens(t) for t in texts]
    weights = sif_weights(Counter(w for ts in tokenised for w in ts), sif_a) if sif_a is not None else None
    out = {p: np.zeros((len(texts), words.width), dtype=np.float32) for p in poolings}
    known_total = all_total = 0
    for row, text_tokens in enumerate(tokenised):
        ids = [words.index[w] for w in text_tokens if w in words.index]
        all_total += len(text_tokens)
        known_total += len(ids)
        if not ids:
            continue
        matrix = np.asarray(words.vectors[ids], dtype=np.float32)
        if weights is not None:
            matrix = matrix * np.array([weights[w] for w in text_tokens if w in words.index], dtype=np.float32)[:, None]
        for pooling in poolings:
            if pooling == "mean":
                out[pooling][row] = matrix.mean(axis=0)
            elif pooling == "max":
                out[pooling][row] = matrix.max(axis=0)
            elif pooling == "mean_sqrt_len":
                out[pooling][row] = matrix.sum(axis=0) / np.sqrt(len(ids))
    if remove_first_component:
        out = {p: first_component_removed(v) for p, v in out.items()}
    return out, (1.0 - known_total / all_total) if all_total else 0.0
