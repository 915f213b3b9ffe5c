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

from harness.metrics import PairCodes, adjusted_rand, scores_from_table

BOOTSTRAPPED = ("ari", "ami", "nmi", "v_measure")
ROWS_PER_DRAW = 64  # an even number of rows keeps the random stream equal to one (B, n) draw


def resample_indices(n: int, resamples: int, seed: int) -> Iterator[np.ndarray]:
    """Indices of each bootstrap resample, in the order numpy's ``rng.integers(0, n, (resamples, n))`` gives them."""
    rng = np.random.default_rng(seed)
    done = 0
    while done < resamples:
        rows = min(ROWS_PER_DRAW, resamples - done)
        yield from rng.integers(0, n, (rows, n))
        done += rows


def bootstrap_distributions(labels_true: np.ndarray, seed_clusterings: list[np.ndarray], *, resamples: int,
                            seed: int) -> dict[str, np.ndarray]:
    """Per bootstrapped score, its value on each resample (mean over the seeds' clusterings)."""
    n = labels_true.size
    codes = [PairCodes(labels_true, clusters) for clusters in seed_clusterings]
    out = {name: np.empty(resamples) for name in BOOTSTRAPPED}
    for b, indices in enumerate(resample_indices(n, resamples, seed)):
        counts = np.bincount(indices, minlength=n).astype(float)
        per_seed = [scores_from_table(code.table(counts)) for code in codes]
        for name in BOOTSTRAPPED:
            out[name][b] = np.mean([scores[name] for scores in per_seed])
    return out


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
