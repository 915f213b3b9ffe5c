"""External scores from contingency tables, many tables at once, for resampling.

A bootstrap resample of texts is a vector of draw counts; the resampled contingency
table is a weighted bincount over fixed (label, cluster) pair codes, and a block of
resamples is one bincount over (resample, pair) codes. Every score follows from the
tables with array arithmetic. The formulas are scikit-learn's (pair-confusion ARI,
arithmetic-mean NMI and AMI, V-measure with beta = 1), except that on a bootstrap
resample ARI leaves out the pairs of two copies of one text (``self_pairs``; see the
comment in ``scores_from_tables``). The tests check equality with scikit-learn on
resampled label arrays (ARI where no text repeats, and against explicit pair enumeration
where texts repeat) and with the plain per-resample reference (tests/reference_bootstrap.py).
"""

from __future__ import annotations

import numpy as np

from harness.metrics._expected_mi import expected_mutual_info

EPS = np.finfo(float).eps


class PairCodes:
    """Fixed integer codes of (label, cluster) pairs, so that any reweighting of texts gives a contingency table."""

    def __init__(self, labels_true: np.ndarray, labels_pred: np.ndarray):
        _, true_codes = np.unique(labels_true, return_inverse=True)
        self.cluster_values, pred_codes = np.unique(labels_pred, return_inverse=True)
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


def self_pair_counts(indices: np.ndarray, n: int) -> np.ndarray:
    """Per row of ``indices`` (resamples x draws of text indices among ``n``), the sum over texts of the squared
    draw count: the number of ordered pairs of draws that are copies of one text (a draw with itself included)."""
    rows = indices.shape[0]
    counts = np.bincount((indices + n * np.arange(rows)[:, None]).ravel(), minlength=rows * n).reshape(rows, n)
    return (counts.astype(np.float64) ** 2).sum(axis=1)


def scores_from_tables(tables: np.ndarray, self_pairs: np.ndarray | None = None) -> dict[str, np.ndarray]:
    """ARI, AMI, NMI, V-measure, homogeneity and completeness of each table of a stack (T, rows: gold labels,
    columns: clusters).

    Empty rows and columns are ignored, as scikit-learn ignores labels that do not occur. ``self_pairs`` (T,) is,
    per table, the weighted number of ordered pairs of an item with a copy of itself (a bootstrap resample: the sum
    of the squared draw counts, ``self_pair_counts``); ARI counts only pairs of distinct texts. Default: each unit
    of weight is a distinct item (self_pairs = n), which is scikit-learn's ARI of the arrays the table describes.
    """
    tables = np.asarray(tables, dtype=np.float64)
    if tables.ndim != 3:
        raise ValueError(f"The 'tables' parameter must be 3-D (tables, labels, clusters). "
                         f"Got shape {tables.shape} instead.")
    n = tables.sum(axis=(1, 2))
    same_text = n if self_pairs is None else np.asarray(self_pairs, dtype=np.float64)
    rows, cols = tables.sum(axis=2), tables.sum(axis=1)
    n_rows, n_cols = (rows > 0).sum(axis=1), (cols > 0).sum(axis=1)
    trivial = ((n_rows == 1) & (n_cols == 1)) | (n_rows == 0) | (n_cols == 0)

    with np.errstate(divide="ignore", invalid="ignore"):
        # ARI from the pair confusion matrix (scikit-learn's pair_confusion_matrix, in ordered pairs), over pairs of
        # distinct texts. A cell of weight n_ij holds n_ij^2 ordered pairs of draws; scikit-learn removes the n_ij
        # pairs of a draw with itself. On a bootstrap resample a text drawn w times also gives w(w-1) pairs of two
        # copies of itself, which agree in both partitions by construction and pull ARI towards 1 (at chance the
        # 95% interval then misses the score). Removing every pair of copies of one text, sum_t w_t^2 (Q), from the
        # diagonal leaves the pairs (s, t), s != t, each weighted w_s w_t: all four pair counts have expectation
        # (n-1)/n times the full sample's under multinomial draws (E[w_s w_t] = 1 - 1/n for s != t), so the
        # resample's pair shares centre on the sample's. This is the bootstrap of the pair-count U-statistic with
        # the diagonal left out rather than the V-statistic (Arcones & Gine 1992, Ann. Statist. 20(2), on
        # bootstrapping U- and V-statistics; cited from memory). Q = n without repeated texts: scikit-learn's value.
        sum_squares = (tables ** 2).sum(axis=(1, 2))
        tp = sum_squares - same_text
        fp = (cols ** 2).sum(axis=1) - sum_squares
        fn = (rows ** 2).sum(axis=1) - sum_squares
        tn = n * n - same_text - fp - fn - tp
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
    return {"ari": ari, "ami": ami, "nmi": nmi, "v_measure": v, "homogeneity": homogeneity, "completeness": completeness}


def scores_from_table(table: np.ndarray, self_pairs: float | None = None) -> dict[str, float]:
    """The scores of ``scores_from_tables`` for one contingency table (rows: gold labels, columns: clusters)."""
    pairs = None if self_pairs is None else np.array([self_pairs], dtype=np.float64)
    return {name: float(values[0]) for name, values in scores_from_tables(np.asarray(table)[None], pairs).items()}
