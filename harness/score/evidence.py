"""Uncertainty of a configuration's scores: a two-level bootstrap over seeds and texts, ties with the leader,
seed stability.

A configuration is a trial without its seed; its score is the mean over seeds. Two
sources of chance move that mean: which texts the corpus happens to hold, and which
seeds were run. Seeds and texts are crossed (every seed clusters the same texts), so
each bootstrap resample draws both independently, as the pigeonhole bootstrap does
for a crossed design (Owen, 2007, Annals of Applied Statistics 1(2)): S seeds with
replacement from the S run, and n texts with replacement; the resample's score is the
mean, over the drawn seeds (with their multiplicity), of each seed's score on the
drawn texts. Every drawn seed sees the same drawn texts.

With fewer than SEED_LEVEL_MINIMUM seeds the seeds are too few to resample (two seeds
give three possible draws); the bootstrap then resamples texts only and the interval
says nothing about seed-to-seed spread: the caller must say so (``interval_scope``).

The draws depend only on the evidence seed, n and S, so every configuration of a
dataset is resampled on the same seed draws and the same text draws: the difference
to the leader is bootstrapped pairwise. The text draws are the ones
scipy.stats.bootstrap makes with ``np.random.default_rng(seed)``; the seed draws come
from a stream of their own, so they leave the text draws unchanged.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from itertools import combinations
from typing import Iterator

import numpy as np

from harness._settings import Settings
from harness.geometry.cluster import SEEDED_CLUSTERERS
from harness.geometry.reduce import SEEDED_REDUCERS
from harness.metrics import PairCodes, adjusted_rand, scores_from_table, scores_from_tables, self_pair_counts

BOOTSTRAPPED = ("ari", "ami", "nmi", "v_measure")
# Plug-in information scores, re-centred on the sample's score (see recentred); ARI is not: it counts pairs of
# distinct texts only (harness/metrics/_contingency.py), which removes the copies' agreement at its source.
RECENTRED = ("ami", "nmi", "v_measure")
ROWS_PER_DRAW = 64  # resamples per block; an even number keeps the random stream equal to one (B, n) draw
SCORED_CELLS = 1 << 21  # table cells scored per call (16 MB per float64 temporary): a whole B = 1,000 of tables up
#                         to about 2,000 cells (e.g. 20 labels x 100 clusters), blocks of 64 for the largest
SEED_LEVEL_MINIMUM = 3  # fewer seeds than this: intervals and ties cover text sampling only
SEED_STREAM = 1  # the seed draws use np.random.default_rng([seed, SEED_STREAM]), apart from the text draws
SCOPE_SEEDS_AND_TEXTS, SCOPE_TEXTS_ONLY = "seeds_and_texts", "texts_only"


def interval_scope(n_seeds: int) -> str:
    """What a configuration's intervals and tie flags cover: seeds and texts, or (fewer than 3 seeds) texts only."""
    return SCOPE_SEEDS_AND_TEXTS if n_seeds >= SEED_LEVEL_MINIMUM else SCOPE_TEXTS_ONLY


def resample_blocks(n: int, resamples: int, seed: int) -> Iterator[np.ndarray]:
    """Blocks of bootstrap resamples (rows x n text indices), in the order ``rng.integers(0, n, (resamples, n))``
    gives them.

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


def seed_weights(n_seeds: int, resamples: int, seed: int) -> np.ndarray:
    """(resamples, n_seeds): each seed's weight in each resample's mean over seeds; every row sums to 1.

    From SEED_LEVEL_MINIMUM seeds on, the weight is how often the seed was drawn (S draws with replacement) over S;
    below it every seed weighs 1/S in every resample (texts-only bootstrap).
    """
    if n_seeds < SEED_LEVEL_MINIMUM:
        return np.full((resamples, n_seeds), 1.0 / n_seeds)
    draws = np.random.default_rng([seed, SEED_STREAM]).integers(0, n_seeds, (resamples, n_seeds))
    return (draws[:, :, None] == np.arange(n_seeds)).sum(axis=1) / n_seeds


def recentred(resampled: np.ndarray, estimate: float) -> np.ndarray:
    """The resample scores shifted by the bootstrap's estimate of their bias, mean(resampled) - estimate, so that
    they centre on the sample's score and keep their spread.

    A resample of n texts drawn with replacement holds about 0.632 n distinct texts, copies of one text always
    agree with each other, and a plug-in mutual information is biased upwards by about (R-1)(C-1)/(2N) for an
    R x C table of N distinct items (Miller 1955, the Miller-Madow correction; from memory). So AMI, NMI and V on
    resamples sit above the sample's score by a bias of the order of their own spread (measured at chance with
    N = 150, k = 5: 1.8 standard deviations; N = 2,000, k = 20: 8.4), and the percentile interval can miss the
    score. There is no pair structure to remove the copies from (as for ARI), so the shift removes the extra bias
    resampling adds (the bias estimate of Efron & Tibshirani 1993, An Introduction to the Bootstrap, section 10.2:
    mean of the replications minus the estimate). What the interval then covers: for AMI, corrected for chance,
    the population's value; for NMI and V, which are not, the expected plug-in score of a sample of n texts (the
    estimator's own upward bias stays in it; subtracting the bias twice, as E&T's bias-corrected estimate does,
    would target the population value but leave the reported score outside its interval near chance). The
    README's "Intervals" says so, and tests/test_evidence.py checks both by coverage. NaN resamples are left out
    of the mean.
    """
    with np.errstate(all="ignore"):
        bias = np.nanmean(resampled) - estimate if np.any(np.isfinite(resampled)) else 0.0
    return resampled - bias if np.isfinite(bias) else resampled


def per_seed_resampled_scores(labels_true: np.ndarray, seed_clusterings: list[np.ndarray], *, resamples: int,
                              seed: int) -> dict[str, np.ndarray]:
    """Per bootstrapped score, an array (seeds, resamples): each seed's score on each resample of texts.

    ARI counts pairs of distinct texts only; AMI, NMI and V are re-centred on each seed's score (``recentred``).
    One draw of text indices per block serves every seed; clusterings equal across seeds are scored once.
    """
    distinct: dict[bytes, int] = {}
    order = [distinct.setdefault(np.asarray(c).tobytes(), len(distinct)) for c in seed_clusterings]
    codes = [PairCodes(labels_true, seed_clusterings[order.index(i)]) for i in range(len(distinct))]
    # Every resample's table is scored on its own (no score mixes tables), so scoring the tables of many blocks in
    # one call gives each resample the value a call per block gives it (tests/test_evidence.py compares the two);
    # calls hold up to SCORED_CELLS table cells, so that memory stays bounded for large tables.
    # (whole blocks: the rows of a call are a multiple of ROWS_PER_DRAW, at least one block; the tables of every
    # distinct clustering are held until the call, so memory is their number times SCORED_CELLS)
    largest = max(code.shape[0] * code.shape[1] for code in codes)
    rows_per_call = max(ROWS_PER_DRAW, SCORED_CELLS // largest // ROWS_PER_DRAW * ROWS_PER_DRAW)
    pending: list[list[np.ndarray]] = [[] for _ in codes]
    pending_copies: list[np.ndarray] = []
    parts: list[list[dict[str, np.ndarray]]] = [[] for _ in codes]

    def score_pending() -> None:
        copies = np.concatenate(pending_copies)
        for i, tables in enumerate(pending):
            parts[i].append(scores_from_tables(np.concatenate(tables), copies))
            tables.clear()
        pending_copies.clear()

    for block in resample_blocks(labels_true.size, resamples, seed):
        pending_copies.append(self_pair_counts(block, labels_true.size))
        for i, code in enumerate(codes):
            pending[i].append(code.resampled_tables(block))
        if sum(c.size for c in pending_copies) >= rows_per_call:
            score_pending()
    if pending_copies:
        score_pending()
    scored = [{name: np.concatenate([part[name] for part in seed_parts]) for name in BOOTSTRAPPED}
              for seed_parts in parts]
    for code, values in zip(codes, scored):
        estimate = scores_from_table(code.table())
        for name in RECENTRED:
            values[name] = recentred(values[name], estimate[name])
    return {name: np.stack([scored[i][name] for i in order]) for name in BOOTSTRAPPED}


def bootstrap_distributions(labels_true: np.ndarray, seed_clusterings: list[np.ndarray], *, resamples: int,
                            seed: int) -> dict[str, np.ndarray]:
    """Per bootstrapped score, its value on each resample: the seed-weighted mean of the seeds' scores on the
    resample's texts (two-level from SEED_LEVEL_MINIMUM seeds on, texts only below)."""
    per_seed = per_seed_resampled_scores(labels_true, seed_clusterings, resamples=resamples, seed=seed)
    weights = seed_weights(len(seed_clusterings), resamples, seed)
    return {name: (weights * values.T).sum(axis=1) for name, values in per_seed.items()}


def percentile_interval(distribution: np.ndarray, level: float = 0.95) -> tuple[float, float]:
    """The percentile bootstrap interval: the (1-level)/2 and (1+level)/2 quantiles."""
    alpha = (1.0 - level) / 2.0
    low, high = np.percentile(distribution, [alpha * 100, (1 - alpha) * 100])
    return float(low), float(high)


def tied_with(leader: np.ndarray, other: np.ndarray, level: float = 0.95) -> tuple[bool, tuple[float, float]]:
    """Whether the paired bootstrap interval of (leader - other) contains 0, and that interval."""
    low, high = percentile_interval(leader - other, level)
    return bool(low <= 0.0 <= high), (low, high)


def seed_free(reducer: Settings, clusterer: Settings) -> bool:
    """Whether no stage of a pipeline takes the trial's seed, so every seed gives the same clustering by construction.

    Decided from the stage registries: reducers and clusterers declare whether they use the seed
    (SEEDED_REDUCERS, SEEDED_CLUSTERERS, which also decide whether the seed enters their stage keys); transform
    steps receive no seed at all (their registry signature has none), and the encode stage never sees the trial's
    seed. tests/test_evidence.py checks this over every registered reducer x clusterer by fitting each with two seeds.
    """
    return reducer.method not in SEEDED_REDUCERS and clusterer.method not in SEEDED_CLUSTERERS


def stability_ari(seed_clusterings: list[np.ndarray]) -> float:
    """Mean ARI over all pairs of seeds' clusterings: how reproducible the clustering is. NaN for one seed."""
    pairs = list(combinations(seed_clusterings, 2))
    if not pairs:
        return float("nan")
    return float(np.mean([adjusted_rand(a, b) for a, b in pairs]))


STABILITY_TAG, SCOPE_TAG, VERDICT_TAG = "harness.stability", "harness.interval_scope", "harness.verdict"


@dataclass
class ConfigurationEvidence:
    """Seed-aggregated scores of one configuration."""

    means: dict[str, float]
    stds: dict[str, float]
    n_seeds: int = 1
    valid_seeds: dict[str, int] = field(default_factory=dict)  # per score: seeds that gave a finite value
    intervals: dict[str, tuple[float, float]] = field(default_factory=dict)
    distributions: dict[str, np.ndarray] = field(default_factory=dict)
    stability: float | None = float("nan")  # None: not applicable (seed-free pipeline), so not logged

    @property
    def scope(self) -> str | None:
        """What the intervals cover (None without intervals)."""
        return interval_scope(self.n_seeds) if self.intervals else None

    def metrics(self) -> dict[str, float]:
        flat = dict(self.means)
        flat.update({f"{k}_std": v for k, v in self.stds.items()})
        flat.update({f"{k}_valid_seeds": float(v) for k, v in self.valid_seeds.items()})
        for name, (low, high) in self.intervals.items():
            flat[f"{name}_ci_low"], flat[f"{name}_ci_high"] = low, high
        if self.stability is not None:
            flat["stability_ari"] = self.stability
        flat["n_seeds"] = float(self.n_seeds)
        return flat

    def tags(self) -> dict[str, str]:
        """The configuration run's tags: stability not applicable (seed-free), what the intervals cover, and a
        provisional verdict below 3 seeds."""
        tags = {}
        if self.stability is None:
            tags[STABILITY_TAG] = "not_applicable"
        if self.scope is not None:
            tags[SCOPE_TAG] = self.scope
        if self.n_seeds < SEED_LEVEL_MINIMUM:
            tags[VERDICT_TAG] = "provisional"
        return tags


def configuration_evidence(seed_scores: list[dict[str, float]], seed_clusterings: list[np.ndarray],
                           labels_true: np.ndarray | None, *, resamples: int, seed: int, level: float = 0.95,
                           seed_free: bool = False) -> ConfigurationEvidence:
    """Mean and sample standard deviation over seeds of every score, bootstrap intervals, and seed stability.

    For a seed-free pipeline (``seed_free``) stability is not applicable: its seeds agree by construction, and a
    1.0 would let a deterministic pipeline win a stability ranking for free.
    """
    names = sorted(set().union(*seed_scores)) if seed_scores else []
    values = {name: np.array([s.get(name, np.nan) for s in seed_scores], dtype=float) for name in names}
    with np.errstate(all="ignore"):
        means = {name: float(np.nanmean(v)) if not np.all(np.isnan(v)) else float("nan") for name, v in values.items()}
        # The sample standard deviation (ddof = 1): with 2 or 3 seeds the population form understates the spread
        # by a factor sqrt((S - 1) / S); undefined (NaN) for fewer than 2 valid seeds.
        stds = {name: float(np.nanstd(v, ddof=1)) if np.count_nonzero(~np.isnan(v)) > 1 else float("nan")
                for name, v in values.items()}
    # A mean over fewer seeds than were run (NaN on the others) must not pass for a mean over all of them.
    valid = {name: int(np.count_nonzero(np.isfinite(v))) for name, v in values.items()}
    evidence = ConfigurationEvidence(means=means, stds=stds, n_seeds=len(seed_clusterings), valid_seeds=valid,
                                     stability=None if seed_free else stability_ari(seed_clusterings))
    if labels_true is not None and resamples > 0:
        evidence.distributions = bootstrap_distributions(labels_true, seed_clusterings, resamples=resamples, seed=seed)
        evidence.intervals = {name: percentile_interval(d, level) for name, d in evidence.distributions.items()}
    return evidence
