"""The in-memory corpus every stage reads, and sampling helpers."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from harness.keys import texts_digest


@dataclass(frozen=True)
class Corpus:
    """Texts with optional gold labels. ``labels`` are 0-based ints indexing ``label_names``."""

    name: str
    texts: list[str]
    ids: np.ndarray
    labels: np.ndarray | None = None
    label_names: tuple[str, ...] | None = None
    source: str = ""
    fingerprint: str = field(init=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "fingerprint", texts_digest(self.texts, self.labels))

    @property
    def n_texts(self) -> int:
        return len(self.texts)

    @property
    def n_classes(self) -> int | None:
        return None if self.labels is None else int(np.unique(self.labels).size)


def stratified_indices(labels: np.ndarray, size: int, seed: int) -> np.ndarray:
    """Row indices of a subsample of ``size`` rows keeping each class's share (largest remainder), sorted."""
    if size >= labels.size:
        return np.arange(labels.size)
    rng = np.random.default_rng(seed)
    classes, counts = np.unique(labels, return_counts=True)
    exact = counts * size / labels.size
    quota = np.floor(exact).astype(int)
    remainder_order = np.argsort(-(exact - quota), kind="stable")
    quota[remainder_order[: size - quota.sum()]] += 1
    chosen = [rng.choice(np.flatnonzero(labels == c), size=q, replace=False) for c, q in zip(classes, quota)]
    return np.sort(np.concatenate(chosen))


def random_indices(n_rows: int, size: int, seed: int) -> np.ndarray:
    if size >= n_rows:
        return np.arange(n_rows)
    return np.sort(np.random.default_rng(seed).choice(n_rows, size=size, replace=False))
