"""Every equivalence the planner declares, checked by computing both sides for real.

The planner computes some trials from another trial's stages: a mean_sqrt_len trial from
mean's pooled vectors where the path after pooling ignores a positive factor per row, and
a trial whose whole stage chain an earlier trial already has (another seed of a seed-free
pipeline, transform: l2 vs normalize: l2) is marked ``equivalent_to`` it. Here, over a grid
of families x long-text modes x transforms x normalisations x reducers, every such pair is
computed independently on a tiny model and compared after the path's normalisation: the
vectors the reducer sees, with the row scaling removed where the reducer's metric ignores it.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from harness.datasets import loaded_corpus
from harness.embed.encode import pooled_variants, token_counts
from harness.embed.lexical import tfidf_svd
from harness.embed.models import loaded_encoder, loaded_word_vectors
from harness.embed.static_vectors import static_pooled, tokens
from harness.engine.runner import prepared_sweep
from harness.geometry.cluster import cluster_labels
from harness.geometry.reduce import reduced
from harness.geometry.transforms import l2_normalized, transformed

from conftest import write_sweep

# (family, extra model settings) x long-text mode: the grid of the issue.
MODELS = [
    ("sentence_transformer", {}),
    ("transformer", {}),
    ("static", {}),
    ("static", {"remove_first_component": True}),
    ("lexical", {"dimensions": 12}),
]
LONG_TEXTS = ["truncate", "chunk_mean"]
TRANSFORMS = """
    - none
    - l2
    - center
    - {method: whiten, k: 8}
    - {method: all_but_the_top, d: 2}
    - remove_length
    - [center, remove_length, l2]
    - [l2, center]
    - [{method: all_but_the_top, d: 2}, l2]"""
REDUCERS = """
    - {method: umap, n_components: 4, n_neighbors: 10, metric: cosine}
    - {method: umap, n_components: 4, n_neighbors: 10, metric: euclidean}
    - {method: umap, n_components: 4, n_neighbors: 10, metric: correlation}
    - {method: pca, n_components: 5}
    - {method: none}"""
N_TEXTS = 60
MAX_LENGTH = 16  # room for 14 tokens: most synthetic requests are split into windows of unequal length


def _sweep_text(model: str, family: str, extra: dict, long_texts: str) -> str:
    settings = ", ".join(f"{k}: {str(v).lower() if isinstance(v, bool) else v}" for k, v in extra.items())
    max_length = f", max_length: {MAX_LENGTH}" if family in ("sentence_transformer", "transformer") else ""
    return f"""
name: equivalences
datasets:
  - {{source: synthetic, n_texts: {N_TEXTS}, topic_share: 0.4, seed: 2}}
models:
  - {{name: {model}, family: {family}, long_texts: {long_texts}{max_length}{', ' + settings if settings else ''}}}
grid:
  pooling: [mean, mean_sqrt_len, cls]
  transform:{TRANSFORMS}
  normalize: [none, l2]
  reduce:{REDUCERS}
  cluster:
    - {{method: hdbscan, min_cluster_size: 5}}
    - {{method: kmeans, k: 3}}
  seeds: [0, 1]
"""


_LOADED: dict[tuple, object] = {}


def _loaded(trial):
    """The trial's encoder (or word vectors), loaded once per model and family in this module."""
    key = (str(trial.resolved_model.folder), trial.model.family, trial.model.max_length)
    if key not in _LOADED:
        _LOADED[key] = (loaded_word_vectors(trial.resolved_model) if trial.model.family == "static" else
                        loaded_encoder(trial.resolved_model, trial.model.max_length, trial.model.trust_remote_code))
    return _LOADED[key]


def _own_pooled(trial, pooling: str, texts: list[str]) -> np.ndarray:
    """The trial's model, pooled with ``pooling``, computed here from the model itself (no planner, no cache)."""
    model = trial.model
    if model.family == "lexical":
        return tfidf_svd(texts, dimensions=model.dimensions, seed=0)
    if model.family == "static":
        pooled, _ = static_pooled(_loaded(trial), texts, [pooling], sif_a=model.sif_a,
                                  remove_first_component=model.remove_first_component)
        return pooled[pooling]
    variant = (trial.layers, pooling)
    return pooled_variants(_loaded(trial), texts, [variant], batch_size=16, long_texts=model.long_texts)[variant]


def _counts(trial, texts: list[str]) -> np.ndarray:
    if trial.model.family in ("static", "lexical"):
        return np.array([len(tokens(t)) for t in texts])
    return token_counts(_loaded(trial), texts)


def _seen_by_reducer(vectors: np.ndarray, reducer) -> np.ndarray:
    """The vectors as the reducer's metric sees them: rows scaled to unit length for cosine, centred first for
    correlation (both distances ignore a positive factor per row); as they are otherwise."""
    vectors = np.asarray(vectors, dtype=np.float64)
    metric = getattr(reducer, "metric", None)
    if metric == "correlation":
        vectors = vectors - vectors.mean(axis=1, keepdims=True)
    if metric in ("cosine", "correlation"):
        return l2_normalized(vectors)
    return vectors


@pytest.mark.parametrize("family,extra,long_texts", [(f, e, m) for (f, e), m in itertools.product(MODELS, LONG_TEXTS)],
                         ids=[f"{f}{'-rfc' if e.get('remove_first_component') else ''}-{m}"
                              for (f, e), m in itertools.product(MODELS, LONG_TEXTS)])
def test_every_declared_equivalence_holds_when_both_sides_are_computed(tmp_path, tiny_model_dir, family, extra,
                                                                       long_texts):
    name = {"static": "glove-6b-50d", "lexical": "tfidf"}.get(family, str(tiny_model_dir))
    prepared = prepared_sweep(write_sweep(tmp_path, _sweep_text(name, family, extra, long_texts)))
    texts = loaded_corpus(prepared.sweep.datasets[0]).texts
    by_key = {t.key: t for t in prepared.trials}
    first = prepared.trials[0]
    counts = _counts(first, texts)
    pooled_cache: dict[tuple, np.ndarray] = {}

    def pooled(trial, pooling):
        key = (trial.layers, pooling)
        if key not in pooled_cache:
            pooled_cache[key] = _own_pooled(trial, pooling, texts)
        return pooled_cache[key]

    def reduced_input(trial, pooling):
        return _seen_by_reducer(transformed(pooled(trial, pooling), counts, trial.steps), trial.reducer)

    checked, seed_free_checked = 0, set()
    for trial in prepared.trials:
        # 1. A trial computed from another pooling's vectors: its own pooling must give the same vectors.
        computed_from = trial.stages["pool"].settings["pooling"]
        if computed_from != trial.pooling:
            own, used = reduced_input(trial, trial.pooling), reduced_input(trial, computed_from)
            assert np.abs(own - used).max() <= 1e-5, (
                f"{trial.name} is computed from {computed_from} but its own vectors differ by "
                f"{np.abs(own - used).max():.2e} after the path's normalisation")
            checked += 1
        # 2. A trial marked equivalent to another: the same vectors reach the reducer, and any seed that differs
        #    is ignored by the reducer and the clusterer.
        if trial.equivalent_to:
            other = by_key[trial.equivalent_to]
            mine, theirs = reduced_input(trial, trial.pooling), reduced_input(other, other.pooling)
            assert np.abs(mine - theirs).max() <= 1e-5, f"{trial.name} ~ {other.name}"
            assert trial.reducer == other.reducer and trial.clusterer == other.clusterer
            seeds = (trial.stages["transform"].key, trial.stages["cluster"].key, trial.seed, other.seed)
            if trial.seed != other.seed and seeds not in seed_free_checked:  # same inputs: checked once
                vectors = transformed(pooled(trial, trial.pooling), counts, trial.steps)
                a, b = reduced(vectors, trial.reducer, trial.seed), reduced(vectors, other.reducer, other.seed)
                assert np.array_equal(a, b), f"{trial.reducer.method} is declared seed-free but depends on the seed"
                assert np.array_equal(cluster_labels(a, trial.clusterer, trial.seed, None),
                                      cluster_labels(a, other.clusterer, other.seed, None))
                seed_free_checked.add(seeds)
            checked += 1
    assert checked > 0  # every cell of the grid declares some equivalence (at least the seed-free pairs)
