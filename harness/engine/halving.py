"""Successive halving over sample sizes (Jamieson & Talwalkar 2016; Li et al. 2017 for the idea): every
configuration is scored on a small stratified subsample, the best 1/factor go on to a subsample factor times
larger, and so on up to the whole corpus.

Pure: the round sizes, a nested stratified order of a corpus's rows (each round's texts are a prefix of it,
so every round holds the previous round's texts), the subcorpus of a round, and the survivors of a round.
A subcorpus is a new corpus: its content (texts, ids, labels) keys its stages and trials (plan.dataset_key),
so a round's results never mix with another round's or with the whole corpus's.
"""

from __future__ import annotations

import math
from typing import Mapping, Optional, Sequence

import numpy as np

from harness.datasets import Corpus


def round_sizes(n_texts: int, start_texts: int, factor: int) -> list[int]:
    """Texts per round: start, start x factor, ... while fewer than the corpus has, then the whole corpus."""
    if start_texts < 1 or factor < 2:
        raise ValueError(f"The 'start_texts' and 'factor' parameters must be >= 1 and >= 2. Got {start_texts} and {factor} instead.")
    sizes, size = [], start_texts
    while size < n_texts:
        sizes.append(size)
        size *= factor
    return sizes + [n_texts]


def nested_order(labels: Optional[np.ndarray], n_rows: int, seed: int) -> np.ndarray:
    """A seeded order of the rows whose every prefix keeps each class's share to within one text.

    Within each class the rows are shuffled; the j-th of a class of n_c rows is placed at (j + 0.5) / n_c of
    the way through (ties between classes broken at random), so a prefix of any length holds about
    length x n_c / n_rows rows of each class. Without labels it is a plain random order."""
    rng = np.random.default_rng(seed)
    if labels is None:
        return rng.permutation(n_rows)
    labels = np.asarray(labels)
    if labels.shape != (n_rows,):
        raise ValueError(f"The 'labels' parameter must have one label per row ({n_rows}). Got shape {labels.shape} instead.")
    position = np.empty(n_rows)
    for label in np.unique(labels):
        rows = rng.permutation(np.flatnonzero(labels == label))
        position[rows] = (np.arange(rows.size) + 0.5) / rows.size
    return np.lexsort((rng.random(n_rows), position))


def round_rows(order: np.ndarray, size: int) -> np.ndarray:
    """The rows of a round of ``size`` texts, in the corpus's own order."""
    return np.sort(order[:size])


def subcorpus(corpus: Corpus, rows: np.ndarray) -> Corpus:
    """The corpus restricted to ``rows`` (same name, label names and source)."""
    return Corpus(
        name=corpus.name, texts=[corpus.texts[i] for i in rows], ids=np.asarray(corpus.ids)[rows],
        labels=None if corpus.labels is None else np.asarray(corpus.labels)[rows], label_names=corpus.label_names,
        source=corpus.source, notes={**corpus.notes, "halving_rows": int(len(rows))},
    )


def survivors(values: Mapping[str, float], factor: int,
              distributions: Optional[Mapping[str, Optional[np.ndarray]]] = None, level: float = 0.95) -> list[str]:
    """The configurations a round keeps: the best ceil(k / factor) by value (higher is better; no value, or NaN,
    is worst), every one whose value equals the last kept one's (a tie at the cut line is not broken by the order
    of the grid), and, given each configuration's paired bootstrap distribution of the value (the same resampled
    texts for every configuration of a round), every one tied with a configuration at the cut line: the paired
    interval of their difference contains 0 (``evidence.tied_with``, the leaderboard's tie test). In the order of
    ``values``."""
    from harness.score.evidence import tied_with

    names = list(values)
    if not names:
        return []
    keep = max(1, math.ceil(len(names) / factor))
    score = {n: (float(values[n]) if values[n] is not None and math.isfinite(float(values[n])) else -math.inf) for n in names}
    ranked = sorted(names, key=lambda n: -score[n])  # stable: equal values keep the grid's order
    line = score[ranked[keep - 1]]
    kept = set(ranked[:keep]) | ({n for n in names if score[n] == line} if line > -math.inf else set())
    if distributions is not None and line > -math.inf:
        drawn = {n: d for n, d in distributions.items() if d is not None and np.size(d) > 0}
        at_line = [n for n in kept if score[n] == line and n in drawn]
        kept |= {n for n in names if n not in kept and n in drawn and score[n] > -math.inf
                 and any(tied_with(drawn[m], drawn[n], level)[0] for m in at_line)}
    return [n for n in names if n in kept]