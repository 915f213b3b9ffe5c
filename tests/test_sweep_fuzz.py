"""Random YAML documents: the sweep parser accepts them or raises the tool's own error, never anything else."""

from __future__ import annotations

from pathlib import Path

import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from harness.errors import SweepError
from harness.sweep import sweep_from_text

scalars = st.one_of(st.none(), st.booleans(), st.integers(-10**6, 10**6), st.floats(allow_nan=True),
                    st.text(max_size=12), st.sampled_from(["mean", "umap", "kmeans", "synthetic", "labels", "l2", "last"]))
keys = st.one_of(st.text(max_size=10), st.sampled_from(
    ["name", "datasets", "models", "grid", "pooling", "layers", "reduce", "cluster", "method", "source", "seeds",
     "transform", "normalize", "rank_by", "evidence", "k", "n_texts", "path", "min_cluster_size"]))
documents = st.recursive(scalars, lambda children: st.one_of(st.lists(children, max_size=4),
                                                           st.dictionaries(keys, children, max_size=5)), max_leaves=25)
raw_texts = st.one_of(documents.map(lambda d: yaml.safe_dump(d, allow_unicode=True)), st.text(max_size=200))


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(raw_texts)
def test_random_documents_are_accepted_or_refused_with_a_sweep_error(text):
    try:
        sweep_from_text(text, "fuzz.yaml", Path("."))
    except SweepError as err:
        assert "\n" not in str(err) and str(err).startswith("fuzz.yaml")
