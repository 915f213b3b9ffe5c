"""Uncertainty of a configuration's scores: bootstrap intervals over texts, ties with the leader, seed stability.

A configuration is a trial without its seed; its score is the mean over seeds.
Resampling texts with replacement B times (seeded) gives a distribution of that
mean; the 95 % interval is its 2.5th and 97.5th percentiles. Every configuration
of a dataset is resampled with the same seed, hence on the same resamples, so the
difference to the leader can be bootstrapped pairwise.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from itertools import combinations
from typing import Iterator

import numpy as np

from harness.metrics import PairCodes, adjusted_rand, scores_from_tables

BOOTSTRAPPED = ("ari", "ami", "nmi", "v_measure")
ROWS_PER_DRAW = 64  # resamples per block; an even number keeps the random stream equal to one (B, n) draw


def resample_blocks(n: int, resamples: int, seed: int) -> Iterator[np.ndarray]:
    """Blocks of bootstrap resamples (rows x n text indices), in the order ``rng.integers(0, n, (resamples, n))`` gives them.

    That is the draw scipy.stats.bootstrap makes with the same generator, so intervals can be checked against it.
    """
    rng = np.random.default_rng(seed)
    done = 0
    while done < resamples:
        rows = min(ROWS_PER_DRAW, resamples - done)
        yield rng.integers(0, n, (rows, n))
        done += rows


def resample_indices(n: int, resamples: int, seed: int) -> Iterator[np.ndarray]:
    """Indices of each bootstrap resample, one at a time (the rows of ``resample_blocks``)."""
    for block in resample_blocks(n, resamples, seed):
        yield from block


def per_seed_resampled_scores(labels_true: np.ndarray, seed_clusterings: list[np.ndarray], *, resamples: int,
                              seed: int) -> dict[str, np.ndarray]:
    """Per bootstrapped score, an array (seeds, resamples): each seed's score on each resample of texts.

    One draw of text indices per block serves every seed; clusterings equal across seeds are scored once.
    """
    distinct: dict[bytes, int] = {}
    order = [distinct.setdefault(np.asarray(c).tobytes(), len(distinct)) for c in seed_clusterings]
    codes = [PairCodes(labels_true, seed_clusterings[order.index(i)]) for i in range(len(distinct))]
    blocks: list[list[dict[str, np.ndarray]]] = [[] for _ in codes]
    for block in resample_blocks(labels_true.size, resamples, seed):
        for i, code in enumerate(codes):
            blocks[i].append(scores_from_tables(code.resampled_tables(block)))
    scored = [{name: np.concatenate([b[name] for b in seed_blocks]) for name in BOOTSTRAPPED} for seed_blocks in blocks]
    return {name: np.stack([scored[i][name] for i in order]) for name in BOOTSTRAPPED}


def bootstrap_distributions(labels_true: np.ndarray, seed_clusterings: list[np.ndarray], *, resamples: int,
                            seed: int) -> dict[str, np.ndarray]:
    """Per bootstrapped score, its value on each resample (mean over the seeds' clusterings)."""
    per_seed = per_seed_resampled_scores(labels_true, seed_clusterings, resamples=resamples, seed=seed)
    return {name: values.mean(axis=0) for name, values in per_seed.items()}


def percentile_interval(distribution: np.ndarray, level: float = 0.95) -> tuple[float, float]:
    """The percentile bootstrap interval: the (1-level)/2 and (1+level)/2 quantiles."""
    alpha = (1.0 - level) / 2.0
    low, high = np.percentile(distribution, [alpha * 100, (1 - alpha) * 100])
    return float(low), float(high)


def tied_with(leader: np.ndarray, other: np.ndarray, level: float = 0.95) -> tuple[bool, tuple[float, float]]:
    """Whether the paired bootstrap interval of (leader - other) contains 0, and that interval."""
    low, high = percentile_interval(leader - other, level)
    return bool(low <= 0.0 <= high), (low, high)


def stability_ari(seed_clusterings: list[np.ndarray]) -> float:
    """Mean ARI over all pairs of seeds' clusterings: how reproducible the clustering is. NaN for one seed."""
    pairs = list(combinations(seed_clusterings, 2))
    if not pairs:
        return float("nan")
    return float(np.mean([adjusted_rand(a, b) for a, b in pairs]))


@dataclass
class ConfigurationEvidence:
    """Seed-aggregated scores of one configuration."""

    means: dict[str, float]
    stds: dict[str, float]
    intervals: dict[str, tuple[float, float]] = field(default_factory=dict)
    distributions: dict[str, np.ndarray] = field(default_factory=dict)
    stability: float = float("nan")

    def metrics(self) -> dict[str, float]:
        flat = dict(self.means)
        flat.update({f"{k}_std": v for k, v in self.stds.items()})
        for name, (low, high) in self.intervals.items():
            flat[f"{name}_ci_low"], flat[f"{name}_ci_high"] = low, high
        flat["stability_ari"] = self.stability
        return flat


def configuration_evidence(seed_scores: list[dict[str, float]], seed_clusterings: list[np.ndarray],
                           labels_true: np.ndarray | None, *, resamples: int, seed: int,
                           level: float = 0.95) -> ConfigurationEvidence:
    """Mean and standard deviation over seeds of every score, bootstrap intervals, and seed stability."""
    names = sorted(set().union(*seed_scores)) if seed_scores else []
    values = {name: np.array([s.get(name, np.nan) for s in seed_scores], dtype=float) for name in names}
    with np.errstate(all="ignore"):
        means = {name: float(np.nanmean(v)) if not np.all(np.isnan(v)) else float("nan") for name, v in values.items()}
        stds = {name: float(np.nanstd(v)) if not np.all(np.isnan(v)) else float("nan") for name, v in values.items()}
    evidence = ConfigurationEvidence(means=means, stds=stds, stability=stability_ari(seed_clusterings))
    if labels_true is not None and resamples > 0:
        evidence.distributions = bootstrap_distributions(labels_true, seed_clusterings, resamples=resamples, seed=seed)
        evidence.intervals = {name: percentile_interval(d, level) for name, d in evidence.distributions.items()}
    return evidence
