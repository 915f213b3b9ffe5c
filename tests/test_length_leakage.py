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


def test_leakage_is_measured_after_the_transform_and_the_pooled_figure_keeps_its_own_name(tmp_path, tiny_model_dir):
    # Every transform row of a pooling used to show the pooled vectors' figure, so remove_length could never show
    # an effect. Now length_leakage_r2 is measured on the vectors that are reduced, length_leakage_r2_pooled on the
    # pooled ones; both are checked against a recomputation from the model here.
    from harness.embed.encode import pooled_variants, token_counts
    from harness.embed.models import loaded_encoder, resolve_model
    from harness.engine.runner import loaded_corpora, prepared_sweep, run_sweep_file
    from harness.geometry.transforms import length_removed

    from conftest import finished_runs, write_sweep

    sweep = write_sweep(tmp_path, f"""
name: leakage_place
datasets:
  - {{source: synthetic, n_texts: 300, topic_share: 0.3, seed: 4}}
models: [{tiny_model_dir}]
grid:
  pooling: [mean_sqrt_len]
  transform: [none, remove_length]
  reduce:
    - {{method: pca, n_components: 5}}
  cluster:
    - {{method: kmeans, k: labels}}
evidence: {{resamples: 20, permutations: 19}}
""")
    result = run_sweep_file(sweep, tmp_path / "results")
    _, _, runs = finished_runs(result.tracking_uri, "leakage_place")
    by_transform = {r.data.params["transform"]: r.data.metrics for r in runs}
    texts = loaded_corpora(prepared_sweep(sweep))["town_requests"].texts
    encoder = loaded_encoder(resolve_model(str(tiny_model_dir)), None, False)
    pooled = pooled_variants(encoder, texts, [("last", "mean_sqrt_len")], batch_size=64)[("last", "mean_sqrt_len")]
    counts = np.maximum(token_counts(encoder, texts), 1)
    pooled_r2 = length_leakage_r2(pooled, counts)
    assert pooled_r2 > 0.5  # mean_sqrt_len carries sqrt(length) in every row's norm
    assert by_transform["none"]["length_leakage_r2"] == pytest.approx(pooled_r2, abs=1e-6)
    assert by_transform["remove_length"]["length_leakage_r2"] == pytest.approx(
        length_leakage_r2(length_removed(pooled, counts), counts), abs=1e-6)
    assert by_transform["remove_length"]["length_leakage_r2"] < pooled_r2 - 0.3  # the remedy shows its effect
    for metrics in by_transform.values():
        assert metrics["length_leakage_r2_pooled"] == pytest.approx(pooled_r2, abs=1e-6)
