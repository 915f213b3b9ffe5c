"""A plain per-resample bootstrap, the reference for the batched one (harness/score/evidence.py).

The per-resample loop of commit 3a07799 (one Python call of ``scores_from_table`` per
resample and seed), brought to the corrected definition of the resample scores and
written independently of harness/metrics: ARI counts pairs of distinct texts only (a
text drawn w times contributes w * w ordered pairs of copies, removed from the pair
counts; with w = 1 for every text this is scikit-learn's ARI), and AMI, NMI and V are
shifted so that their mean over resamples is the sample's score (the bootstrap bias
correction). tests/test_evidence.py checks the array implementation against it to 1e-12
for the same resample indices, and ARI here against explicit pair enumeration;
benchmarks/run.py times one against the other. Not a test module (no ``test_`` prefix):
nothing here is collected.
"""

from __future__ import annotations

import numpy as np
from sklearn.metrics.cluster._expected_mutual_info_fast import expected_mutual_information

ROWS_PER_DRAW = 64


def resample_indices(n: int, resamples: int, seed: int):
    """Indices of each bootstrap resample, in the order numpy's ``rng.integers(0, n, (resamples, n))`` gives them."""
    rng = np.random.default_rng(seed)
    done = 0
    while done < resamples:
        rows = min(ROWS_PER_DRAW, resamples - done)
        yield from rng.integers(0, n, (rows, n))
        done += rows


class PairCodes:
    def __init__(self, labels_true: np.ndarray, labels_pred: np.ndarray):
        _, true_codes = np.unique(labels_true, return_inverse=True)
        _, pred_codes = np.unique(labels_pred, return_inverse=True)
        self.shape = (int(true_codes.max()) + 1, int(pred_codes.max()) + 1)
        self.codes = true_codes * self.shape[1] + pred_codes

    def table(self, weights: np.ndarray | None = None) -> np.ndarray:
        flat = np.bincount(self.codes, weights=weights, minlength=self.shape[0] * self.shape[1])
        return flat.reshape(self.shape)


def _entropy(counts: np.ndarray, total: float) -> float:
    counts = counts[counts > 0]
    p = counts / total
    return float(-(p * np.log(p)).sum())


def scores_from_table(table: np.ndarray, copy_pairs: float | None = None) -> dict[str, float]:
    """ARI, AMI, NMI and V-measure of one contingency table (rows: gold labels, columns: clusters).

    ``copy_pairs``: ordered pairs of a text with a copy of itself, itself included (the sum of squared draw counts);
    default: the table's total (every item a distinct text).
    """
    table = table[table.sum(axis=1) > 0][:, table.sum(axis=0) > 0]
    n = float(table.sum())
    copies = n if copy_pairs is None else float(copy_pairs)
    rows, cols = table.sum(axis=1), table.sum(axis=0)

    sum_squares = float((table ** 2).sum())
    tp = sum_squares - copies
    fp = float((cols ** 2).sum()) - sum_squares
    fn = float((rows ** 2).sum()) - sum_squares
    tn = n * n - copies - tp - fp - fn
    if fn == 0 and fp == 0:
        ari = 1.0
    else:
        ari = 2.0 * (tp * tn - fn * fp) / ((tp + fn) * (fn + tn) + (tp + fp) * (fp + tn))

    h_true, h_pred = _entropy(rows, n), _entropy(cols, n)
    nonzero = table > 0
    outer = np.outer(rows, cols)[nonzero]
    mi = float(((table[nonzero] / n) * (np.log(table[nonzero]) + np.log(n) - np.log(outer))).sum())
    mi = max(mi, 0.0)
    trivial = (table.shape[0] == table.shape[1] == 1) or table.size == 0
    if trivial:
        nmi = 1.0
    elif mi == 0:
        nmi = 0.0
    else:
        nmi = mi / max((h_true + h_pred) / 2.0, np.finfo(float).eps)
    homogeneity = mi / h_true if h_true else 1.0
    completeness = mi / h_pred if h_pred else 1.0
    v = 0.0 if homogeneity + completeness == 0 else 2 * homogeneity * completeness / (homogeneity + completeness)

    if trivial:
        ami = 1.0
    elif 1 in table.shape:
        ami = 0.0
    else:
        emi = expected_mutual_information(np.rint(table).astype(np.int64), int(round(n)))
        denominator = (h_true + h_pred) / 2.0 - emi
        eps = np.finfo(float).eps
        denominator = min(denominator, -eps) if denominator < 0 else max(denominator, eps)
        ami = (mi - emi) / denominator
    return {"ari": float(ari), "ami": float(ami), "nmi": float(nmi), "v_measure": float(v)}


BOOTSTRAPPED = ("ari", "ami", "nmi", "v_measure")
RECENTRED = ("ami", "nmi", "v_measure")


def per_resample_scores(labels_true: np.ndarray, clusters: np.ndarray, resamples: int, seed: int) -> dict[str, np.ndarray]:
    """Each score on each resample of one clustering: one ``scores_from_table`` call per resample; the information
    scores then shifted by (their mean over resamples - the sample's score)."""
    n = labels_true.size
    codes = PairCodes(labels_true, clusters)
    out = {name: np.empty(resamples) for name in BOOTSTRAPPED}
    for b, indices in enumerate(resample_indices(n, resamples, seed)):
        counts = np.bincount(indices, minlength=n).astype(float)
        scores = scores_from_table(codes.table(counts), copy_pairs=float((counts ** 2).sum()))
        for name in BOOTSTRAPPED:
            out[name][b] = scores[name]
    sample = scores_from_table(codes.table())
    for name in RECENTRED:
        out[name] = out[name] - (np.nanmean(out[name]) - sample[name])
    return out


def bootstrap_distributions(labels_true: np.ndarray, seed_clusterings: list[np.ndarray], *, resamples: int,
                            seed: int) -> dict[str, np.ndarray]:
    """Per bootstrapped score, its value on each resample: the plain mean over the seeds' clusterings."""
    per_seed = [per_resample_scores(labels_true, clusters, resamples, seed) for clusters in seed_clusterings]
    return {name: np.mean([scores[name] for scores in per_seed], axis=0) for name in BOOTSTRAPPED}
