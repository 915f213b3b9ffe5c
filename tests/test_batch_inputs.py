"""The forward pass tokenises each text once and builds its batches from those ids.

The rule: for every tokenizer, truncation side and padding side, a batch built from the ids (cut to fit, the special
tokens around them, the tokenizer's padding) equals the batch the tokenizer makes itself with padding=True,
truncation=True and max_length (the reference: transformers' own __call__). Where a tokenizer breaks the rule, the
first batch shows it and the pass falls back to the tokenizer for every batch.
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest

from harness.embed import encode
from harness.embed.encode import _batch_inputs, _tokenized_batch, _truncated, length_sorted_batches, token_ids

from conftest import _minilm_tokenizer

TEXTS = [
    "", " ", "a", "The bin on Elm Street was not emptied this week.",
    "Streetlight out " * 40, "Café naïve façade, Zürich – 東京 🚲 pothole!!", "one two three four five six seven eight",
    "x" * 300, "\n\t spaces   between\n words ", "Potholes, bins, lights; " * 9,
]


def _byte_level_bpe():
    """A RoBERTa-style tokenizer built here: byte-level BPE trained on TEXTS, <s> text </s>, no token type ids."""
    from tokenizers import Tokenizer, decoders, models, pre_tokenizers, processors, trainers
    from transformers import PreTrainedTokenizerFast

    core = Tokenizer(models.BPE(unk_token=None))
    core.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=True)
    core.decoder = decoders.ByteLevel()
    core.train_from_iterator(TEXTS * 3, trainers.BpeTrainer(vocab_size=400, special_tokens=["<pad>", "<s>", "</s>"]))
    core.post_processor = processors.TemplateProcessing(
        single="<s> $A </s>", special_tokens=[("<s>", core.token_to_id("<s>")), ("</s>", core.token_to_id("</s>"))])
    return PreTrainedTokenizerFast(tokenizer_object=core, bos_token="<s>", eos_token="</s>", pad_token="<pad>",
                                   model_input_names=["input_ids", "attention_mask"])


def _char_bert():
    from transformers import BertTokenizer

    characters = "abcdefghijklmnopqrstuvwxyz0123456789"
    vocabulary = ["[PAD]", "[UNK]", "[CLS]", "[SEP]", "[MASK]", *characters, *(f"##{c}" for c in characters)]
    return BertTokenizer(vocab={word: i for i, word in enumerate(vocabulary)})


TOKENIZERS = {"minilm_wordpiece_fast": _minilm_tokenizer, "char_wordpiece_slow": _char_bert,
              "byte_level_bpe": _byte_level_bpe}


@pytest.mark.parametrize("name", sorted(TOKENIZERS))
@pytest.mark.parametrize("truncation_side", ["right", "left"])
@pytest.mark.parametrize("padding_side", ["right", "left"])
@pytest.mark.parametrize("max_length", [8, 64])
def test_batches_from_ids_equal_the_tokenizers_own(name, truncation_side, padding_side, max_length):
    tokenizer = TOKENIZERS[name]()
    tokenizer.truncation_side, tokenizer.padding_side = truncation_side, padding_side
    encoder = SimpleNamespace(tokenizer=tokenizer, max_length=max_length)
    ids = token_ids(encoder, TEXTS)
    pieces = _truncated(encoder, ids)
    cut = 0
    for batch in length_sorted_batches(np.array([len(i) for i in ids]), 3):
        ours, theirs = _batch_inputs(encoder, pieces, batch), _tokenized_batch(encoder, TEXTS, batch)
        assert sorted(ours.keys()) == sorted(theirs.keys())
        for key in theirs:
            assert ours[key].tolist() == theirs[key].tolist(), (key, batch)
        cut += int((theirs["attention_mask"].sum(dim=1) == max_length).sum())
    assert cut >= 1  # a text was cut, so the truncation side was exercised


def test_a_tokenizer_that_breaks_the_rule_falls_back_to_its_own_batches(tiny_model_dir, monkeypatch):
    # A wrong special-token wrapping stands in for a tokenizer whose ids depend on its special tokens: the first
    # batch differs from the tokenizer's, so every batch is tokenised by the tokenizer, and the vectors are the same.
    from harness.embed.models import loaded_encoder, resolve_model

    encoder = loaded_encoder(resolve_model(str(tiny_model_dir)), 32, False)
    variants = [("last", "mean"), ("last", "cls")]
    calls = []
    original = encode._tokenized_batch
    monkeypatch.setattr(encode, "_tokenized_batch", lambda *a: calls.append(1) or original(*a))
    expected = encode.pooled_variants(encoder, TEXTS, variants, batch_size=3)
    assert len(calls) == 1  # the rule holds for this tokenizer: only the first batch is checked
    calls.clear()
    monkeypatch.setattr(encode, "special_wrapping", lambda tokenizer: ([], []))
    fallen_back = encode.pooled_variants(encoder, TEXTS, variants, batch_size=3)
    assert len(calls) == len(length_sorted_batches(np.zeros(len(TEXTS)), 3))  # every batch by the tokenizer
    for variant in variants:
        assert np.array_equal(fallen_back[variant], expected[variant])
