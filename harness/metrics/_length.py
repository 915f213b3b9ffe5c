"""How much text length explains a grouping."""

from __future__ import annotations

import hashlib
import threading

import numpy as np
import pandas as pd

from harness.metrics._checks import check_positive, check_same_length


def length_eta_squared(lengths: np.ndarray, groups: np.ndarray) -> float:
    """Share of the variance of log length explained by group membership (correlation ratio, squared)."""
    lengths, groups = check_same_length(lengths, groups, names=("lengths", "groups"))
    log_len = np.log(check_positive(lengths, "lengths"))
    total = ((log_len - log_len.mean()) ** 2).sum()
    if total == 0.0:
        return 0.0
    means = pd.Series(log_len).groupby(groups).transform("mean").to_numpy()
    return float(((means - log_len.mean()) ** 2).sum() / total)


def length_epsilon_squared(lengths: np.ndarray, groups: np.ndarray) -> float:
    """eta^2 of log length corrected for chance: Kelley's epsilon^2 (Kelley, 1935, PNAS 21),
    1 - (1 - eta^2) (N - 1) / (N - k), with k the number of groups present. NaN when every text is its own group.

    Why this form. If lengths were dealt to the groups at random (group sizes fixed), the between-group sum of
    squares of a group of size n_g has expectation SS_total (N - n_g) / (N (N - 1)) per text (sampling without
    replacement), so E[eta^2] = (k - 1) / (N - 1) exactly, whatever the sizes: raw eta^2 grows with the number of
    groups even when they ignore length (0.17 for 200 random groups of 1,200 texts). epsilon^2 equals
    (eta^2 - E) / (1 - E), the chance correction ARI and AMI apply to their indices, so its expectation under
    that null is exactly 0 and its maximum still 1. Hays's omega^2 (1963) has the same numerator over
    SS_total + MS_within, a denominator that moves with the draw, so it is unbiased only approximately; epsilon^2
    is chosen for the exact zero and because anyone can recompute it from eta^2, N and k.
    """
    lengths, groups = check_same_length(lengths, groups, names=("lengths", "groups"))
    n, k = lengths.size, np.unique(groups).size
    if k >= n:
        return float("nan")
    if k == 1 or np.ptp(np.log(check_positive(lengths, "lengths"))) == 0.0:
        return 0.0  # one group, or every text of one length: nothing to explain, nothing to correct
    return float(1.0 - (1.0 - length_eta_squared(lengths, groups)) * (n - 1) / (n - k))


def length_confound_index(lengths: np.ndarray, clusters: np.ndarray, labels: np.ndarray) -> float:
    """How far clusters separate texts by length beyond what the topics themselves do, corrected for chance.

    (eps2(L|clusters) - eps2(L|labels)) / (1 - eps2(L|labels)), with L = log length and eps2 Kelley's epsilon^2
    (``length_epsilon_squared``). Noise (HDBSCAN's -1) is one group of its own: which texts a clusterer leaves
    unclustered is part of how it splits the corpus (all short texts left as noise is a length effect), it counts
    once in k, and the chance correction holds for any partition, noise group included. The label term is
    corrected the same way, on the same texts, so clusters equal to the labels score exactly 0 and clusters drawn
    at random score 0 in expectation for any number of clusters. 1: clusters split texts by length beyond topic;
    below 0: the clusters carry less length information than the labels (not clipped, so that the index stays
    unbiased near 0, as ARI and AMI are not clipped). NaN when every text is its own cluster.
    """
    lengths, clusters, labels = check_same_length(lengths, clusters, labels, names=("lengths", "clusters", "labels"))
    by_clusters = length_epsilon_squared(lengths, clusters)
    by_labels = length_epsilon_squared(lengths, labels)
    if by_labels >= 1.0:
        return 0.0  # the labels fix every length: there is nothing left for clusters to separate
    return float((by_clusters - by_labels) / (1.0 - by_labels))


def length_scores(lengths: np.ndarray, clusters: np.ndarray, labels: np.ndarray | None) -> dict[str, float]:
    """The length measures of one clustering: raw eta^2 and chance-corrected epsilon^2 of the clusters (and of the
    labels, with the index, when labelled)."""
    scores = {"length_eta2_clusters": length_eta_squared(lengths, clusters),
              "length_epsilon2_clusters": length_epsilon_squared(lengths, clusters)}
    if labels is not None:
        scores["length_eta2_labels"] = length_eta_squared(lengths, labels)
        scores["length_epsilon2_labels"] = length_epsilon_squared(lengths, labels)
        scores["length_confound_index"] = length_confound_index(lengths, clusters, labels)
    return scores


def length_eta2_pvalue(lengths: np.ndarray, groups: np.ndarray, *, permutations: int = 999, seed: int = 0) -> float:
    """Permutation p-value of eta^2(log length | groups): how often shuffled lengths explain as much.

    p = (1 + #{eta2 of a permutation >= observed}) / (1 + permutations), the usual
    Monte Carlo estimate that never returns 0.
    """
    lengths, groups = check_same_length(lengths, groups, names=("lengths", "groups"))
    if permutations < 1:
        raise ValueError(f"The 'permutations' parameter must be >= 1. Got {permutations} instead.")
    log_len = np.log(check_positive(lengths, "lengths"))
    _, codes = np.unique(groups, return_inverse=True)
    sizes = np.bincount(codes).astype(float)
    centred = log_len - log_len.mean()
    total = float((centred ** 2).sum())
    if total == 0.0:
        return 1.0

    membership = np.zeros((codes.size, sizes.size))
    membership[np.arange(codes.size), codes] = 1.0

    def between(values: np.ndarray) -> np.ndarray:  # (m, n) -> between-group sum of squares per row
        return ((values @ membership) ** 2 / sizes).sum(axis=1)

    observed = between(centred[None, :])[0]
    tolerance = 1e-12 * max(abs(observed), 1.0)  # ties at floating-point level count as exceeding
    exceed = sum(int((between(shuffled) >= observed - tolerance).sum())
                 for shuffled in _shuffled_chunks(centred, permutations, seed))
    return (1 + exceed) / (1 + permutations)


# The shuffles of a set of lengths, kept for the next grouping with the same seed (every clustering of a corpus
# with that seed draws the same ones): the most recently used sets, up to this many values in all (8 bytes each,
# 128 MB).
_SHUFFLES_KEPT_UP_TO = 16_000_000
_kept_shuffles: dict[tuple, list[np.ndarray]] = {}
_kept_shuffles_lock = threading.Lock()  # a Dask worker may score on several threads


def _shuffled_chunks(centred: np.ndarray, permutations: int, seed: int) -> list[np.ndarray]:
    """``permutations`` shuffles of ``centred`` drawn with ``seed``, in chunks of 256 rows."""
    key = (seed, permutations, centred.size, centred.dtype.str, hashlib.sha256(centred.tobytes()).hexdigest())
    with _kept_shuffles_lock:
        if key in _kept_shuffles:
            _kept_shuffles[key] = _kept_shuffles.pop(key)  # the most recently used set is evicted last
            return _kept_shuffles[key]
    rng = np.random.default_rng(seed)
    chunks, done = [], 0
    while done < permutations:
        chunk = min(256, permutations - done)
        chunks.append(np.stack([rng.permutation(centred) for _ in range(chunk)]))
        done += chunk
    if permutations * centred.size <= _SHUFFLES_KEPT_UP_TO:
        with _kept_shuffles_lock:
            _kept_shuffles[key] = chunks
            while sum(k[1] * k[2] for k in _kept_shuffles) > _SHUFFLES_KEPT_UP_TO:
                del _kept_shuffles[next(iter(_kept_shuffles))]  # the least recently used set first
    return chunks


# The cross-validation of length_leakage_r2: outer folds, and the ridge penalties the inner search chooses from
# (they enter the cached figure's key).
LEAKAGE_FOLDS = 5
LEAKAGE_ALPHAS = tuple(float(a) for a in np.logspace(-2, 4, 13))


def length_leakage_r2(vectors: np.ndarray, lengths: np.ndarray, *, folds: int = LEAKAGE_FOLDS, seed: int = 0,
                      alphas: tuple[float, ...] = LEAKAGE_ALPHAS) -> float:
    """Cross-validated R^2 of a ridge regression predicting log length from the standardised vectors.

    How much length the vectors themselves encode, whatever the clustering. Each feature is
    standardised (on the training folds, scikit-learn's StandardScaler) before the ridge, so that the penalty
    weighs the same at any scale of the vectors and R^2 does not depend on it. The penalty is chosen on each
    training fold among ``alphas`` by exact leave-one-out (``_ridge_loo``: the rule scikit-learn's RidgeCV
    uses, lowest mean squared leave-one-out error; where two penalties' errors tie to the last bits, the two
    computations can round to different choices), so that vectors with more dimensions than a fold has texts
    are not fitted to noise: with a fixed penalty of 1, 768-d vectors of 1,200 texts gave R^2 of -11 (measured
    on 20 Newsgroups), a figure about the fit, not the vectors. Folds are shuffled with ``seed`` (KFold); the
    score is the mean R^2 over the outer folds.
    """
    from sklearn.metrics import r2_score
    from sklearn.model_selection import KFold
    from sklearn.preprocessing import StandardScaler

    from harness.metrics._ridge_loo import ridge_loo_fit

    (lengths,) = check_same_length(lengths, names=("lengths",))
    if vectors.shape[0] != lengths.size:
        raise ValueError(f"The 'vectors' parameter must have one row per length. Got {vectors.shape[0]} rows for {lengths.size} lengths instead.")
    target = np.log(check_positive(lengths, "lengths"))
    points = np.asarray(vectors, dtype=np.float64)
    scores = []
    for train, test in KFold(n_splits=folds, shuffle=True, random_state=seed).split(points):
        scaler = StandardScaler().fit(points[train])
        coefficients, intercept, _ = ridge_loo_fit(scaler.transform(points[train]), target[train], np.asarray(alphas))
        scores.append(r2_score(target[test], scaler.transform(points[test]) @ coefficients + intercept))
    return float(np.mean(scores))
