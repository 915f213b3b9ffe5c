"""External scores from contingency tables, many tables at once, for resampling.

A bootstrap resample of texts is a vector of draw counts; the resampled contingency
table is a weighted bincount over fixed (label, cluster) pair codes, and a block of
resamples is one bincount over (resample, pair) codes. Every score follows from the
tables with array arithmetic. The formulas are scikit-learn's (pair-confusion ARI,
arithmetic-mean NMI and AMI, V-measure with beta = 1); the tests check equality with
scikit-learn on resampled label arrays and with the per-table implementation this
replaces (tests/reference_bootstrap.py).
"""

from __future__ import annotations

import numpy as np

from harness.metrics._expected_mi import expected_mutual_info

EPS = np.finfo(float).eps


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

    def resampled_tables(self, indices: np.ndarray) -> np.ndarray:
        """One integer table per row of ``indices`` (resamples x texts, each row a bootstrap draw of text indices)."""
        rows, cells = indices.shape[0], self.shape[0] * self.shape[1]
        codes = self.codes[indices] + cells * np.arange(rows)[:, None]
        return np.bincount(codes.ravel(), minlength=rows * cells).reshape(rows, *self.shape)


def _entropies(margins: np.ndarray, n: np.ndarray) -> np.ndarray:
    """Entropy (natural log) of each row of margins (T, K) over its total n (T,); zero counts contribute nothing."""
    with np.errstate(divide="ignore", invalid="ignore"):
        p = margins / n[:, None]
        return -np.where(margins > 0, p * np.log(np.where(margins > 0, p, 1.0)), 0.0).sum(axis=1)


def scores_from_tables(tables: np.ndarray) -> dict[str, np.ndarray]:
    """ARI, AMI, NMI and V-measure of each table of a stack (T, rows: gold labels, columns: clusters).

    Empty rows and columns are ignored, as scikit-learn ignores labels that do not occur.
    """
    tables = np.asarray(tables, dtype=np.float64)
    if tables.ndim != 3:
        raise ValueError(f"The 'tables' parameter must be 3-D (tables, labels, clusters). "
                         f"Got shape {tables.shape} instead.")
    n = tables.sum(axis=(1, 2))
    rows, cols = tables.sum(axis=2), tables.sum(axis=1)
    n_rows, n_cols = (rows > 0).sum(axis=1), (cols > 0).sum(axis=1)
    trivial = ((n_rows == 1) & (n_cols == 1)) | (n_rows == 0) | (n_cols == 0)

    with np.errstate(divide="ignore", invalid="ignore"):
        # ARI from the pair confusion matrix, as scikit-learn computes it.
        sum_squares = (tables ** 2).sum(axis=(1, 2))
        tp = sum_squares - n
        fp = (cols ** 2).sum(axis=1) - sum_squares
        fn = (rows ** 2).sum(axis=1) - sum_squares
        tn = n * n - fp - fn - sum_squares
        ari = np.where((fn == 0) & (fp == 0), 1.0,
                       2.0 * (tp * tn - fn * fp) / ((tp + fn) * (fn + tn) + (tp + fp) * (fp + tn)))

        h_true, h_pred = _entropies(rows, n), _entropies(cols, n)
        nonzero = tables > 0
        outer = rows[:, :, None] * cols[:, None, :]
        terms = (tables / n[:, None, None]) * (np.log(np.where(nonzero, tables, 1.0)) + np.log(n)[:, None, None]
                                               - np.log(np.where(nonzero, outer, 1.0)))
        mi = np.maximum(np.where(nonzero, terms, 0.0).sum(axis=(1, 2)), 0.0)

        nmi = np.where(trivial, 1.0, np.where(mi == 0, 0.0, mi / np.maximum((h_true + h_pred) / 2.0, EPS)))
        homogeneity = np.where(h_true != 0, mi / h_true, 1.0)
        completeness = np.where(h_pred != 0, mi / h_pred, 1.0)
        both = homogeneity + completeness
        v = np.where(both == 0, 0.0, 2 * homogeneity * completeness / both)

        ami = np.where(trivial, 1.0, 0.0)  # one label or one cluster (not both): AMI = 0, as scikit-learn returns
        full = ~trivial & (n_rows > 1) & (n_cols > 1)
        if full.any():
            counts = np.rint(tables[full]).astype(np.int64)
            emi = expected_mutual_info(counts.sum(axis=2), counts.sum(axis=1))
            denominator = (h_true[full] + h_pred[full]) / 2.0 - emi
            denominator = np.where(denominator < 0, np.minimum(denominator, -EPS), np.maximum(denominator, EPS))
            # scikit-learn keeps the numerator's sign away from 0 as it does the denominator's, so that a perfect
            # match whose expectation equals its maximum (both 0) scores eps/eps = 1, as it should.
            numerator = mi[full] - emi
            numerator = np.where(numerator < 0, np.minimum(numerator, -EPS), np.maximum(numerator, EPS))
            ami[full] = numerator / denominator
    return {"ari": ari, "ami": ami, "nmi": nmi, "v_measure": v}


def scores_from_table(table: np.ndarray) -> dict[str, float]:
    """ARI, AMI, NMI and V-measure of one contingency table (rows: gold labels, columns: clusters)."""
    return {name: float(values[0]) for name, values in scores_from_tables(np.asarray(table)[None]).items()}
