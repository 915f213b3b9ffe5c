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
    notes: dict = field(default_factory=dict)
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


def per_class_indices(labels: np.ndarray, cap: int, seed: int) -> np.ndarray:
    """At most ``cap`` rows of each class, drawn at random, sorted."""
    rng = np.random.default_rng(seed)
    chosen = []
    for label in np.unique(labels):
        rows = np.flatnonzero(labels == label)
        chosen.append(rows if rows.size <= cap else rng.choice(rows, size=cap, replace=False))
    return np.sort(np.concatenate(chosen))


def balanced_length_indices(lengths: np.ndarray, labels: np.ndarray, seed: int, bins: int = 20) -> np.ndarray:
    """Rows such that every class has the same length distribution, sorted.

    Log lengths are cut at quantiles of the whole corpus; within each bin every
    class keeps as many rows as the class that has fewest there. This removes the
    corpus's own tie between length and label, so that any length effect left in
    the clusters comes from the model.
    """
    rng = np.random.default_rng(seed)
    log_len = np.log(np.maximum(lengths, 1))
    edges = np.unique(np.quantile(log_len, np.linspace(0, 1, bins + 1)[1:-1]))
    bin_of = np.digitize(log_len, edges)
    classes = np.unique(labels)
    chosen = []
    for b in np.unique(bin_of):
        members = [np.flatnonzero((bin_of == b) & (labels == c)) for c in classes]
        keep = min(m.size for m in members)
        chosen += [rng.choice(m, size=keep, replace=False) for m in members if keep]
    return np.sort(np.concatenate(chosen)) if chosen else np.arange(0)
