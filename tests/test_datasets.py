"""The synthetic corpus and the user's files."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from harness.datasets import FileSource, SyntheticSource, loaded_corpus
from harness.datasets.corpus import stratified_indices
from harness.errors import DataError
from harness.metrics import length_eta_squared


def _synthetic(**settings):
    return loaded_corpus(SyntheticSource(source="synthetic", **settings))


def test_synthetic_corpus_is_deterministic_and_sized():
    first, again = _synthetic(n_texts=900, seed=3), _synthetic(n_texts=900, seed=3)
    assert first.texts == again.texts and first.fingerprint == again.fingerprint
    assert _synthetic(n_texts=900, seed=4).fingerprint != first.fingerprint
    words = np.array([len(t.split()) for t in first.texts])
    assert first.n_texts == 900 and first.n_classes == 6
    assert words.min() == 3 and words.max() == 60


def test_synthetic_length_is_independent_of_topic_unless_tied():
    independent = _synthetic(n_texts=3000)
    tied = _synthetic(n_texts=3000, length_topic_tie=1.0)
    words = lambda corpus: np.array([len(t.split()) for t in corpus.texts])  # noqa: E731
    # With 6 groups of 500, eta^2 under independence is about (k-1)/(N-1) = 0.0017; tied lengths make it large.
    assert length_eta_squared(words(independent), independent.labels) < 0.01
    assert length_eta_squared(words(tied), tied.labels) > 0.8


def test_topic_share_sets_the_share_of_topic_words():
    from harness.datasets.synthetic import TOPIC_WORDS

    topic_vocabulary = {w for words in TOPIC_WORDS.values() for w in words}
    for share in (0.1, 0.5):
        corpus = _synthetic(n_texts=600, topic_share=share)
        tokens = [w.strip(".").lower() for t in corpus.texts for w in t.split()]
        assert np.mean([w in topic_vocabulary for w in tokens]) == pytest.approx(share, abs=0.03)


@pytest.mark.parametrize("suffix", ["csv", "parquet", "jsonl"])
def test_files_in_each_format_read_alike(tmp_path, suffix):
    frame = pd.DataFrame({"body": [f"text {i}" for i in range(12)], "team": ["roads", "parks", "water"] * 4,
                          "ticket": [f"T{i}" for i in range(12)]})
    path = tmp_path / f"tickets.{suffix}"
    {"csv": lambda: frame.to_csv(path, index=False), "parquet": lambda: frame.to_parquet(path),
     "jsonl": lambda: path.write_text("\n".join(json.dumps(r) for r in frame.to_dict("records")))}[suffix]()
    corpus = loaded_corpus(FileSource(source="file", path=path, text_column="body", label_column="team", id_column="ticket"))
    assert corpus.texts == frame.body.tolist()
    assert corpus.label_names == ("parks", "roads", "water")
    assert [corpus.label_names[i] for i in corpus.labels] == frame.team.tolist()
    assert corpus.ids.tolist() == frame.ticket.tolist()


def test_stratified_sample_keeps_class_shares():
    labels = np.repeat([0, 1, 2], [500, 300, 200])
    picked = stratified_indices(labels, 100, seed=1)
    assert np.bincount(labels[picked]).tolist() == [50, 30, 20]
    assert np.array_equal(picked, stratified_indices(labels, 100, seed=1))


def test_file_sample_is_stratified_and_seeded(tmp_path):
    path = tmp_path / "t.csv"
    pd.DataFrame({"text": [f"t{i}" for i in range(400)], "label": ["a"] * 300 + ["b"] * 100}).to_csv(path, index=False)
    corpus = loaded_corpus(FileSource(source="file", path=path, sample=40, seed=5))
    assert np.bincount(corpus.labels).tolist() == [30, 10]


def test_empty_texts_are_refused_with_a_count(tmp_path):
    path = tmp_path / "t.csv"
    pd.DataFrame({"text": ["a", "", "  ", "b"], "label": ["x", "y", "x", "y"]}).to_csv(path, index=False)
    with pytest.raises(DataError, match="2 of 4 rows have empty text"):
        loaded_corpus(FileSource(source="file", path=path))


@pytest.mark.parametrize("suffix", ["csv", "parquet", "jsonl"])
def test_empty_labels_are_refused_with_a_count(tmp_path, suffix):
    # An empty cell, a blank one and a null: in a CSV the first two read as "" and would become a class named "";
    # in Parquet and JSON lines the null reads as missing. Each is counted and refused, as empty texts are.
    frame = pd.DataFrame({"text": ["lamp out", "bins", "noise", "pothole", "bench"],
                          "label": ["lights", "", "  ", None, "parks"]})
    path = tmp_path / f"t.{suffix}"
    {"csv": lambda: frame.to_csv(path, index=False), "parquet": lambda: frame.to_parquet(path),
     "jsonl": lambda: path.write_text("\n".join(json.dumps(r) for r in frame.to_dict("records")))}[suffix]()
    with pytest.raises(DataError, match=r"label_column 'label': 3 of 5 rows have an empty label \(first at row 1\)"):
        loaded_corpus(FileSource(source="file", path=path))
