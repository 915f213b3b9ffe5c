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
    # without it a fixed penalty weighs differently at every scale (0.12 at scale 1, 0.005 at 0.005 measured).
    base = length_leakage_r2(VECTORS, LENGTHS)
    assert 0.05 < base < 0.9
    assert length_leakage_r2(VECTORS * scale, LENGTHS) == pytest.approx(base, abs=1e-9)
    per_dimension = RNG.uniform(0.01, 100.0, size=24)
    assert length_leakage_r2(VECTORS * per_dimension, LENGTHS) == pytest.approx(base, abs=1e-9)


def test_leakage_equals_a_nested_cross_validated_ridge_written_out():
    # Reference written out with plain Ridge fits (scikit-learn's Ridge only): 5 shuffled outer folds (same seed);
    # in each, the features standardised on the training fold, the penalty chosen among LEAKAGE_ALPHAS by
    # brute-force leave-one-out on that fold (one refit per left-out text), then R^2 on the held-out fold; the mean
    # over folds. RidgeCV's efficient leave-one-out must choose the same penalty, so the figures agree.
    from sklearn.linear_model import Ridge
    from sklearn.metrics import r2_score
    from sklearn.model_selection import KFold

    from harness.metrics._length import LEAKAGE_ALPHAS

    vectors, lengths = VECTORS[:80, :10], LENGTHS[:80]
    target = np.log(lengths)
    scores = []
    for train, test in KFold(n_splits=5, shuffle=True, random_state=0).split(vectors):
        mean, std = vectors[train].mean(axis=0), vectors[train].std(axis=0)
        x_train, x_test = (vectors[train] - mean) / std, (vectors[test] - mean) / std
        y_train = target[train]

        def loo_error(alpha: float) -> float:
            errors = []
            for i in range(len(train)):
                keep = np.arange(len(train)) != i
                fit = Ridge(alpha=alpha).fit(x_train[keep], y_train[keep])
                errors.append((fit.predict(x_train[i:i + 1])[0] - y_train[i]) ** 2)
            return float(np.mean(errors))

        best = min(LEAKAGE_ALPHAS, key=loo_error)
        scores.append(r2_score(target[test], Ridge(alpha=best).fit(x_train, y_train).predict(x_test)))
    assert length_leakage_r2(vectors, lengths) == pytest.approx(float(np.mean(scores)), abs=1e-9)


def test_leakage_of_vectors_that_carry_no_length_is_near_zero_in_high_dimensions():
    # More dimensions than a fold has texts and no length signal: a fixed penalty fitted the noise (R^2 of -11 on
    # 768-d vectors of 1,200 texts, measured); the penalty chosen by cross-validation shrinks towards the mean.
    rng = np.random.default_rng(3)
    vectors = rng.normal(size=(200, 400))
    lengths = rng.integers(5, 200, size=200)
    assert -0.1 < length_leakage_r2(vectors, lengths) < 0.05


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
