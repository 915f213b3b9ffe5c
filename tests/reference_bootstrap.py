"""The per-resample bootstrap of commit 3a07799, frozen here as the reference for the batched one.

Kept verbatim (one Python call of ``scores_from_table`` per resample and seed) so that
tests/test_evidence.py can check the array implementation against it to 1e-12 for the
same resample indices, and benchmarks/run.py can time one against the other. Not a
test module (no ``test_`` prefix): nothing here is collected.
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


def scores_from_table(table: np.ndarray) -> dict[str, float]:
    """ARI, AMI, NMI and V-measure of one contingency table (rows: gold labels, columns: clusters)."""
    table = table[table.sum(axis=1) > 0][:, table.sum(axis=0) > 0]
    n = float(table.sum())
    rows, cols = table.sum(axis=1), table.sum(axis=0)

    sum_squares = float((table ** 2).sum())
    tp = sum_squares - n
    fp = float((cols ** 2).sum()) - sum_squares
    fn = float((rows ** 2).sum()) - sum_squares
    tn = n * n - fp - fn - sum_squares
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


def per_resample_scores(labels_true: np.ndarray, clusters: np.ndarray, resamples: int, seed: int) -> dict[str, np.ndarray]:
    """Each score on each resample of one clustering: one ``scores_from_table`` call per resample."""
    n = labels_true.size
    codes = PairCodes(labels_true, clusters)
    out = {name: np.empty(resamples) for name in BOOTSTRAPPED}
    for b, indices in enumerate(resample_indices(n, resamples, seed)):
        scores = scores_from_table(codes.table(np.bincount(indices, minlength=n).astype(float)))
        for name in BOOTSTRAPPED:
            out[name][b] = scores[name]
    return out


def bootstrap_distributions(labels_true: np.ndarray, seed_clusterings: list[np.ndarray], *, resamples: int,
                            seed: int) -> dict[str, np.ndarray]:
    """Per bootstrapped score, its value on each resample (mean over the seeds' clusterings), as at 3a07799."""
    n = labels_true.size
    codes = [PairCodes(labels_true, clusters) for clusters in seed_clusterings]
    out = {name: np.empty(resamples) for name in BOOTSTRAPPED}
    for b, indices in enumerate(resample_indices(n, resamples, seed)):
        counts = np.bincount(indices, minlength=n).astype(float)
        per_seed = [scores_from_table(code.table(counts)) for code in codes]
        for name in BOOTSTRAPPED:
            out[name][b] = np.mean([scores[name] for scores in per_seed])
    return out
