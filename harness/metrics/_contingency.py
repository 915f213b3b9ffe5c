"""External scores from a contingency table, for resampling.

A bootstrap resample of texts is a vector of draw counts; the resampled
contingency table is one weighted bincount over fixed (label, cluster) pair
codes, and every score follows from the table. The formulas are scikit-learn's
(pair-confusion ARI, arithmetic-mean NMI and AMI, V-measure with beta = 1), and
the tests check equality with scikit-learn on resampled label arrays.
"""

from __future__ import annotations

import numpy as np

try:  # the exact expected mutual information, as scikit-learn computes it (Cython)
    from sklearn.metrics.cluster._expected_mutual_info_fast import expected_mutual_information
except ImportError:  # pragma: no cover - a future scikit-learn may move it
    expected_mutual_information = None


class PairCodes:
    """Fixed integer codes of (label, cluster) pairs, so that any reweighting of texts gives a contingency table."""

    def __init__(self, labels_true: np.ndarray, labels_pred: np.ndarray):
        _, true_codes = np.unique(labels_true, return_inverse=True)
        _, pred_codes = np.unique(labels_pred, return_inverse=True)
        self.shape = (int(true_codes.max()) + 1, int(pred_codes.max()) + 1)
        self.codes = true_codes * self.shape[1] + pred_codes

    def table(self, weights: np.ndarray | None = None) -> np.ndarray:
        flat = np.bincount(self.codes, weights=weights, minlength=self.shape[0] * self.shape[1])
        return flat.reshape(self.shape)


def _comb2(x: np.ndarray) -> np.ndarray:
    return x * (x - 1) / 2.0


def _entropy(counts: np.ndarray, total: float) -> float:
    counts = counts[counts > 0]
    p = counts / total
    return float(-(p * np.log(p)).sum())


def scores_from_table(table: np.ndarray) -> dict[str, float]:
    """ARI, AMI, NMI and V-measure of one contingency table (rows: gold labels, columns: clusters)."""
    table = table[table.sum(axis=1) > 0][:, table.sum(axis=0) > 0]
    n = float(table.sum())
    rows, cols = table.sum(axis=1), table.sum(axis=0)

    # ARI from the pair confusion matrix, as scikit-learn computes it.
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
