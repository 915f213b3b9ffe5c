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
    # An empty chain (transform none, normalize none) hands the reducer the pooled array itself, so its figure is
    # the pooled one (checked against the recomputation above), computed once: the pooled vectors and the
    # remove_length vectors, 2 computations, not 3.
    assert result.work["leakage_computations"] == 2


def test_only_the_empty_chain_hands_the_reducer_the_pooled_array_itself():
    # The rule behind computing the leakage of an empty chain once: for every transform step the grid offers and
    # every normalisation, the chain is empty exactly for (none, none), and then transformed() returns its input.
    from harness.engine.plan import effective_chain
    from harness.geometry.transforms import NORMALIZATIONS, TRANSFORMS, transformed
    from harness.sweep import GridSettings

    vectors, counts = VECTORS.astype(np.float32), LENGTHS
    steps_with_settings = {"whiten": {"k": 8}, "all_but_the_top": {"d": 2}}
    options = ["none", *({"method": method, **steps_with_settings.get(method, {})} for method in TRANSFORMS)]
    for option in options:
        chain = GridSettings.model_validate({"pooling": ["mean"], "transform": [option],
                                             "cluster": [{"method": "kmeans"}]}).transform[0]
        for normalize in NORMALIZATIONS:
            steps = effective_chain(chain, normalize)
            assert (not steps) == (option == "none" and normalize == "none")
            assert (transformed(vectors, counts, steps) is vectors) == (not steps)


def _ridgecv_pipeline_leakage(vectors, lengths, seed=0):
    """The previous implementation, kept as a reference: scikit-learn's StandardScaler + RidgeCV (efficient
    leave-one-out over the same penalties) scored by cross_val_score on the same shuffled folds."""
    from sklearn.linear_model import RidgeCV
    from sklearn.model_selection import KFold, cross_val_score
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler

    from harness.metrics._length import LEAKAGE_ALPHAS, LEAKAGE_FOLDS

    model = make_pipeline(StandardScaler(), RidgeCV(alphas=LEAKAGE_ALPHAS))
    splitter = KFold(n_splits=LEAKAGE_FOLDS, shuffle=True, random_state=seed)
    return float(cross_val_score(model, np.asarray(vectors, dtype=np.float64), np.log(lengths), cv=splitter,
                                 scoring="r2").mean())


def _design(shape: str, rng):
    n, p = {"tall": (300, 20), "square": (120, 96), "wide": (60, 200), "very_wide": (40, 768)}[shape]
    lengths = rng.integers(3, 300, n)
    signal = (np.log(lengths) - np.log(lengths).mean())[:, None] * rng.normal(size=(1, p)) * rng.choice([0.0, 0.1, 1.0])
    return signal + rng.normal(size=(n, p)), lengths


@pytest.mark.parametrize("shape", ["tall", "square", "wide", "very_wide"])
@pytest.mark.parametrize("variant", ["plain", "constant_column", "collinear", "float32_scaled"])
@pytest.mark.parametrize("seed", [0, 1])
def test_leakage_equals_the_ridgecv_pipeline_on_every_shape(shape, variant, seed):
    # Reference: scikit-learn's RidgeCV (the previous implementation). Every shape where a training fold has more
    # texts than dimensions and fewer (the two branches of _ridge_loo), a constant feature (StandardScaler leaves
    # its scale at 1), exactly collinear features (a zero eigenvalue), float32 vectors at a tiny scale.
    rng = np.random.default_rng(seed)
    vectors, lengths = _design(shape, rng)
    if variant == "constant_column":
        vectors[:, 3] = 7.0
    elif variant == "collinear":
        vectors[:, 1] = 2 * vectors[:, 0] - vectors[:, 2]
    elif variant == "float32_scaled":
        vectors = (vectors * 1e-3).astype(np.float32)
    assert length_leakage_r2(vectors, lengths, seed=seed) == pytest.approx(
        _ridgecv_pipeline_leakage(vectors, lengths, seed=seed), abs=1e-9)


@pytest.mark.parametrize("n,p", [(40, 8), (30, 60)])
def test_the_chosen_penalty_and_fit_equal_brute_force_leave_one_out(n, p):
    # Reference: leave-one-out written out, one plain scikit-learn Ridge refit per left-out text, for a design with
    # fewer dimensions than texts and one with more (both branches); then the full fit at the chosen penalty.
    from sklearn.linear_model import Ridge

    from harness.metrics._length import LEAKAGE_ALPHAS
    from harness.metrics._ridge_loo import ridge_loo_fit

    rng = np.random.default_rng(n + p)
    x = rng.normal(size=(n, p))
    y = x[:, 0] * 0.5 + rng.normal(size=n)

    def loo_error(alpha: float) -> float:
        keep = ~np.eye(n, dtype=bool)
        return float(np.mean([(Ridge(alpha=alpha).fit(x[keep[i]], y[keep[i]]).predict(x[i:i + 1])[0] - y[i]) ** 2
                              for i in range(n)]))

    best = min(LEAKAGE_ALPHAS, key=loo_error)
    coefficients, intercept, alpha = ridge_loo_fit(x, y, np.asarray(LEAKAGE_ALPHAS))
    assert alpha == best
    reference = Ridge(alpha=best).fit(x, y)
    np.testing.assert_allclose(coefficients, reference.coef_, atol=1e-9)
    assert intercept == pytest.approx(reference.intercept_, abs=1e-9)
