"""Pooling and layer selection, checked against sentence-transformers' own Pooling module."""

from __future__ import annotations

import numpy as np
import pytest
import torch

from harness.embed.encode import length_sorted_batches, pooled_variants, token_counts
from harness.embed.layers import selected_hidden
from harness.embed.models import loaded_encoder, resolve_model
from harness.embed.pooling import POOLINGS

from conftest import MINILM

TEXTS = [
    "The streetlight outside number 12 has been flickering for a week.",
    "Bin not collected.",
    "Potholes",
    "Loud music from the flat above every night since Tuesday, please could someone come and listen, "
    "it starts at eleven and goes on until three in the morning and the bass shakes the windows.",
]

ST_MODES = {"cls": "cls", "mean": "mean", "max": "max", "mean_sqrt_len": "mean_sqrt_len_tokens"}


def _reference_pooled(folder, texts, mode):
    """sentence-transformers' Pooling module on the last hidden state (the library is the reference)."""
    from sentence_transformers import SentenceTransformer
    from sentence_transformers.sentence_transformer.modules import Pooling

    model = SentenceTransformer(str(folder), device="cpu")
    transformer = model[0]
    features = transformer.preprocess(texts) if hasattr(transformer, "preprocess") else transformer.tokenize(texts)
    with torch.inference_mode():
        features = transformer(features)
        pooling = Pooling(transformer.get_embedding_dimension(), pooling_mode=mode)
        return pooling(features)["sentence_embedding"].numpy()


@pytest.mark.parametrize("pooling", sorted(ST_MODES))
@pytest.mark.parametrize("which", ["tiny", "minilm"])
def test_last_layer_pooling_equals_sentence_transformers_pooling(pooling, which, tiny_model_dir):
    # Reference: sentence_transformers.sentence_transformer.modules.Pooling, same inputs, tolerance 1e-5 (the bound).
    model = resolve_model(str(tiny_model_dir) if which == "tiny" else MINILM)
    encoder = loaded_encoder(model, None, False)
    ours = pooled_variants(encoder, TEXTS, [("last", pooling)], batch_size=2)[("last", pooling)]
    reference = _reference_pooled(model.folder, TEXTS, ST_MODES[pooling])
    assert np.abs(ours - reference).max() <= 1e-5


def _padded(hidden: torch.Tensor, extra: int, value: float) -> tuple[torch.Tensor, torch.Tensor]:
    batch, tokens, dim = hidden.shape
    padded = torch.cat([hidden, torch.full((batch, extra, dim), value)], dim=1)
    mask = torch.cat([torch.ones(batch, tokens, dtype=torch.long), torch.zeros(batch, extra, dtype=torch.long)], dim=1)
    return padded, mask


@pytest.mark.parametrize("pooling", sorted(POOLINGS))
def test_padding_never_contributes(pooling):
    torch.manual_seed(1)
    hidden = torch.randn(3, 5, 8) - 10.0  # all negative: a max that picked padding (0 or +50) would show
    plain = POOLINGS[pooling](hidden, torch.ones(3, 5, dtype=torch.long))
    for value in (0.0, 50.0, -50.0):
        padded, mask = _padded(hidden, 4, value)
        assert torch.allclose(POOLINGS[pooling](padded, mask), plain, atol=1e-6)


def test_mean_sqrt_len_divides_sixteen_tokens_by_four():
    # Common practice (sentence-transformers' mean_sqrt_len_tokens): the sum over 16 tokens is divided by sqrt(16) = 4.
    hidden = torch.ones(1, 16, 3)
    mask = torch.ones(1, 16, dtype=torch.long)
    assert torch.allclose(POOLINGS["mean_sqrt_len"](hidden, mask), torch.full((1, 3), 16.0 / 4.0))


def test_weighted_mean_weighs_positions_one_to_n():
    # Position-weighted mean: weights 1..n over real tokens, normalised by their sum (n(n+1)/2), written out by hand.
    hidden = torch.tensor([[[1.0], [2.0], [3.0], [99.0]]])
    mask = torch.tensor([[1, 1, 1, 0]])
    expected = (1 * 1 + 2 * 2 + 3 * 3) / (1 + 2 + 3)
    assert POOLINGS["weighted_mean"](hidden, mask).item() == pytest.approx(expected)


def test_last_token_with_left_and_right_padding():
    hidden = torch.arange(8, dtype=torch.float).reshape(2, 4, 1)
    right = torch.tensor([[1, 1, 0, 0], [1, 1, 1, 1]])
    left = torch.tensor([[0, 0, 1, 1], [1, 1, 1, 1]])
    assert POOLINGS["last_token"](hidden, right).flatten().tolist() == [1.0, 7.0]
    assert POOLINGS["last_token"](hidden, left).flatten().tolist() == [3.0, 7.0]


def test_layer_selections():
    states = tuple(torch.full((1, 2, 3), float(i)) for i in range(7))
    assert selected_hidden(states, "last")[0, 0, 0] == 6
    assert selected_hidden(states, "second_last")[0, 0, 0] == 5
    assert selected_hidden(states, "mean_last_4")[0, 0, 0] == pytest.approx((3 + 4 + 5 + 6) / 4)
    assert selected_hidden(states, "concat_last_4").shape == (1, 2, 12)
    assert selected_hidden(states, 0)[0, 0, 0] == 0
    assert selected_hidden(states, -3)[0, 0, 0] == 4


def test_variants_from_one_pass_equal_separate_passes(tiny_model_dir):
    encoder = loaded_encoder(resolve_model(str(tiny_model_dir)), None, False)
    variants = [(layers, pooling) for layers in ("last", "mean_last_4", "concat_last_4", 1) for pooling in POOLINGS]
    together = pooled_variants(encoder, TEXTS, variants, batch_size=3)
    for variant in variants:
        alone = pooled_variants(encoder, TEXTS, [variant], batch_size=1)[variant]
        assert np.abs(together[variant] - alone).max() <= 1e-5


def test_batches_sorted_by_length_restore_order():
    counts = np.array([3, 50, 7, 50, 1])
    batches = length_sorted_batches(counts, 2)
    assert sorted(np.concatenate(batches).tolist()) == [0, 1, 2, 3, 4]
    assert [counts[b].max() for b in batches] == sorted((counts[b].max() for b in batches), reverse=True)


def test_token_counts_exclude_special_tokens(tiny_model_dir):
    encoder = loaded_encoder(resolve_model(str(tiny_model_dir)), None, False)
    assert token_counts(encoder, ["hello world"]).tolist() == [2]


@pytest.mark.parametrize("long_texts", ["truncate", "chunk_mean"])
def test_outputs_are_put_back_in_the_texts_order(tiny_model_dir, long_texts):
    # Texts are batched longest first; each row of the output must be the vector of the text at that position:
    # the same as encoding that text alone. The texts' lengths are out of order on purpose, and batches of 2 mix them.
    encoder = loaded_encoder(resolve_model(str(tiny_model_dir)), 16, False)
    texts = [TEXTS[1], TEXTS[3], TEXTS[2], TEXTS[0], "Lamp out on the corner of the square by the church"]
    lengths = token_counts(encoder, texts)
    assert list(np.argsort(-lengths, kind="stable")) != list(range(len(texts)))  # the sort does reorder them
    variants = [("last", "mean"), (1, "cls")]
    together = pooled_variants(encoder, texts, variants, batch_size=2, long_texts=long_texts)
    for row, text in enumerate(texts):
        alone = pooled_variants(encoder, [text], variants, batch_size=1, long_texts=long_texts)
        for variant in variants:
            assert np.abs(together[variant][row] - alone[variant][0]).max() <= 1e-5, (row, variant)


BATCH_SIZES = (1, 2, 3, 7, 32)
# Texts of 1 to 89 words, out of length order, so that every batch size pads most texts of a batch.
WORDS = "the bin lamp street noise council road light park water bus late night please fix broken".split()
VARYING = [" ".join(WORDS[(i * 7 + j) % len(WORDS)] for j in range(n))
           for i, n in enumerate([1, 2, 3, 5, 8, 13, 21, 34, 55, 89, 4, 1, 30, 7, 60, 2, 17])]
# Pooled vectors of one text under two batch sizes agree to this share of the largest absolute value of the pooled
# matrix. Padding is masked out, but it changes the shapes of the matrix products, and so the order in which float32
# sums are taken: measured on the tiny model, the worst difference over every pooling, three layer choices and both
# long-text modes was 1.9e-7 of the scale (under 2 float32 ulps, eps = 1.2e-7). 1e-5 leaves room for other BLAS
# builds and CPUs; a pooling that let padding in would differ by order 1e-1.
BATCH_TOLERANCE = 1e-5


@pytest.mark.parametrize("long_texts, max_length", [("truncate", None), ("chunk_mean", 16)])
def test_batch_size_changes_pooled_vectors_by_float_rounding_only(tiny_model_dir, long_texts, max_length):
    # The rule behind RESULT_NEUTRAL["ModelSettings.batch_size"] (harness/engine/plan.py), enumerated: every batch size
    # against batch size 1 (no padding at all), for every registered pooling and three layer choices.
    encoder = loaded_encoder(resolve_model(str(tiny_model_dir)), max_length, False)
    variants = [(layers, pooling) for layers in ("last", "mean_last_4", 1) for pooling in POOLINGS]
    unpadded = pooled_variants(encoder, VARYING, variants, batch_size=1, long_texts=long_texts)
    for batch_size in BATCH_SIZES[1:]:
        padded = pooled_variants(encoder, VARYING, variants, batch_size=batch_size, long_texts=long_texts)
        for variant in variants:
            scale = np.abs(unpadded[variant]).max()
            worst = np.abs(padded[variant] - unpadded[variant]).max() / scale
            assert worst <= BATCH_TOLERANCE, (batch_size, variant, worst)
