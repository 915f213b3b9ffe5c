"""Ridge regression with its penalty chosen by exact leave-one-out, every penalty from one eigendecomposition.

The leave-one-out residual of a ridge fit with an unpenalised intercept is (y_i - yhat_i) / (1 - h_ii), where the
hat matrix is 11'/n + Xc (Xc'Xc + alpha I)^-1 Xc' and Xc is the centred design (Hastie, Tibshirani and Friedman,
The Elements of Statistical Learning, 2nd ed., section 7.10.1, for linear smoothers; Golub, Heath and Wahba 1979
for ridge). One eigendecomposition of the smaller Gram matrix (Xc'Xc, or Xc Xc' when there are more features than
texts) gives the fits and the diagonal of the hat matrix for every penalty at once. This is the rule
scikit-learn's RidgeCV applies by default (mean squared leave-one-out error, the first penalty of the lowest error),
computed with other arithmetic: where two penalties' errors tie to the last bits, the two can choose differently
(a reviewer's bisection found such points; on 1,500 random designs they never did). The tests compare the
figures with RidgeCV and the choice with leave-one-out written out as one plain Ridge refit per text.
"""

from __future__ import annotations

import numpy as np


def ridge_loo_fit(x: np.ndarray, y: np.ndarray, alphas: np.ndarray) -> tuple[np.ndarray, float, float]:
    """(coefficients, intercept, chosen alpha) of the ridge fit whose penalty among ``alphas`` has the lowest mean
    squared leave-one-out error (the first of them on a tie)."""
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    alphas = np.asarray(alphas, dtype=np.float64)
    n, p = x.shape
    x_mean, y_mean = x.mean(axis=0), y.mean()
    xc, yc = x - x_mean, y - y_mean
    if p <= n:
        eigenvalues, v = np.linalg.eigh(xc.T @ xc)
        scores = xc @ v  # the design in the eigenbasis: columns have squared norms equal to the eigenvalues
        shrink = 1.0 / (np.clip(eigenvalues, 0.0, None)[:, None] + alphas[None, :])  # (p, alphas)
        projected = scores.T @ yc
        fitted = scores @ (projected[:, None] * shrink)
        leverage = 1.0 / n + (scores ** 2) @ shrink
    else:
        eigenvalues, q = np.linalg.eigh(xc @ xc.T)
        eigenvalues = np.clip(eigenvalues, 0.0, None)
        ratio = eigenvalues[:, None] / (eigenvalues[:, None] + alphas[None, :])  # (n, alphas)
        projected = q.T @ yc
        fitted = q @ (projected[:, None] * ratio)
        leverage = 1.0 / n + (q ** 2) @ ratio
    errors = ((yc[:, None] - fitted) / (1.0 - leverage)) ** 2
    best = int(np.argmin(errors.mean(axis=0)))
    alpha = float(alphas[best])
    if p <= n:
        coefficients = v @ (projected * shrink[:, best])
    else:
        coefficients = xc.T @ (q @ (projected / (eigenvalues + alpha)))
    return coefficients, float(y_mean - x_mean @ coefficients), alpha
