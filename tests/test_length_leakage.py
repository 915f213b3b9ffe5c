"""length_leakage_r2: where it is measured (the vectors that are reduced) and that it ignores the vectors' scale."""

from __future__ import annotations

import numpy as np
import pytest

from harness.metrics import length_leakage_r2

RNG = np.random.default_rng(11)
LENGTHS = RNG.integers(3, 80, 400)
# A weak length signal along one direction, in noise: R^2 well inside (0, 1), where a scale effect would show.
SIGNAL = (np.log(LENGTHS) - np.log(LENGTHS).mean())[:, None] * RNG.normal(size=(1, 24)) * 0.3
VECTORS = SIGNAL + RNG.normal(size=(400, 24))


@pytest.mark.parametrize("scale", [0.005, 1e-3, 10.0, 1000.0])
def test_leakage_does_not_depend_on_the_vectors_scale(scale):
    # Features are standardised before the ridge, so a global scale (or one per dimension) cannot move R^2;
    # without it the penalty alpha = 1 weighs differently at every scale (0.12 at scale 1, 0.005 at 0.005 measured).
    base = length_leakage_r2(VECTORS, LENGTHS)
    assert 0.05 < base < 0.9
    assert length_leakage_r2(VECTORS * scale, LENGTHS) == pytest.approx(base, abs=1e-9)
    per_dimension = RNG.uniform(0.01, 100.0, size=24)
    assert length_leakage_r2(VECTORS * per_dimension, LENGTHS) == pytest.approx(base, abs=1e-9)


def test_leakage_equals_a_cross_validated_ridge_on_standardised_features():
    # Reference: scikit-learn's StandardScaler + Ridge(alpha=1) in a pipeline (the scaler fitted on each training
    # fold only), 5 shuffled folds with the same seed, mean R^2 over folds.
    from sklearn.linear_model import Ridge
    from sklearn.model_selection import KFold, cross_val_score
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler

    folds = KFold(n_splits=5, shuffle=True, random_state=0)
    reference = cross_val_score(make_pipeline(StandardScaler(), Ridge(alpha=1.0)), VECTORS, np.log(LENGTHS),
                                cv=folds, scoring="r2").mean()
    assert length_leakage_r2(VECTORS, LENGTHS) == pytest.approx(reference, abs=1e-12)
