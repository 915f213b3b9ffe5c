"""The forward pass: every pooling x layer variant of a corpus from one pass of the transformer."""

from __future__ import annotations

from typing import Callable, Iterable, Optional

import numpy as np

from harness._crashpoints import crash_point
from harness.embed.layers import LayerChoice, selected_hidden
from harness.embed.models import LoadedEncoder
from harness.embed.pooling import POOLINGS

Variant = tuple[LayerChoice, str]  # (layer selection, pooling)


def token_ids(encoder: LoadedEncoder, texts: list[str]) -> list[list[int]]:
    """Each text's token ids under the model's tokenizer, special tokens excluded, not truncated (one call: a fast
    tokenizer spreads it over the cores)."""
    return encoder.tokenizer(texts, add_special_tokens=False, truncation=False, verbose=False)["input_ids"]


def counts_of(ids: list[list[int]]) -> np.ndarray:
    return np.fromiter((len(text_ids) for text_ids in ids), dtype=np.int64, count=len(ids))


def token_counts(encoder: LoadedEncoder, texts: list[str]) -> np.ndarray:
    """Tokens per text under the model's tokenizer, special tokens excluded, not truncated."""
    return counts_of(token_ids(encoder, texts))


def length_sorted_batches(counts: np.ndarray, batch_size: int) -> list[np.ndarray]:
    """Indices grouped into batches of similar length, longest first, so little is spent on padding."""
    order = np.argsort(-counts, kind="stable")
    return [order[start : start + batch_size] for start in range(0, order.size, batch_size)]


def _room(encoder: LoadedEncoder) -> int:
    """How many of a text's own tokens fit the model with its special tokens."""
    return encoder.max_length - encoder.tokenizer.num_special_tokens_to_add(pair=False)


def _truncated(encoder: LoadedEncoder, ids: list[list[int]]) -> list[list[int]]:
    """Each text's ids cut to fit the model, from the side the tokenizer cuts (its ``truncation_side``)."""
    room = _room(encoder)
    if getattr(encoder.tokenizer, "truncation_side", "right") == "left":
        return [text_ids[-room:] if len(text_ids) > room else text_ids for text_ids in ids]
    return [text_ids[:room] for text_ids in ids]


def _windows(encoder: LoadedEncoder, ids: list[list[int]]) -> tuple[list[list[int]], np.ndarray]:
    """Token ids of every window of every text (windows fit the model with its special tokens), and each window's text."""
    room = _room(encoder)
    pieces, owners = [], []
    for index, text_ids in enumerate(ids):
        for start in range(0, max(len(text_ids), 1), room):
            pieces.append(text_ids[start : start + room])
            owners.append(index)
    return pieces, np.array(owners)


def special_wrapping(tokenizer) -> tuple[list[int], list[int]]:
    """The special token ids a tokenizer puts before and after a single text's tokens ([CLS] ... [SEP], <s> ... </s>)."""
    bare = tokenizer("word", add_special_tokens=False)["input_ids"]
    wrapped = tokenizer("word")["input_ids"]
    for start in range(len(wrapped) - len(bare) + 1):
        if wrapped[start : start + len(bare)] == bare:
            return wrapped[:start], wrapped[start + len(bare) :]
    raise ValueError("cannot tell where this tokenizer puts its special tokens")


def _tokenized_batch(encoder: LoadedEncoder, texts: list[str], batch: np.ndarray):
    """A batch as the tokenizer itself pads and truncates it."""
    return encoder.tokenizer([texts[i] for i in batch], padding=True, truncation=True, max_length=encoder.max_length,
                             return_tensors="pt")


def _batch_inputs(encoder: LoadedEncoder, pieces: list[list[int]], batch: np.ndarray):
    """A batch built from token ids already cut to fit: the special tokens around each, then the tokenizer's padding."""
    tokenizer = encoder.tokenizer
    before, after = special_wrapping(tokenizer)
    features = {"input_ids": [before + pieces[i] + after for i in batch]}
    features["attention_mask"] = [[1] * len(ids) for ids in features["input_ids"]]
    if "token_type_ids" in tokenizer.model_input_names:
        features["token_type_ids"] = [[0] * len(ids) for ids in features["input_ids"]]
    return tokenizer.pad(features, return_tensors="pt")


def _same_inputs(left, right) -> bool:
    return left.keys() == right.keys() and all(left[name].shape == right[name].shape and bool((left[name] == right[name]).all())
                                               for name in left)


def pooled_variants(
    encoder: LoadedEncoder,
    texts: list[str],
    variants: Iterable[Variant],
    *,
    batch_size: int,
    counts: Optional[np.ndarray] = None,
    ids: Optional[list[list[int]]] = None,
    on_batch: Optional[Callable[[int], None]] = None,
    long_texts: str = "truncate",
) -> dict[Variant, np.ndarray]:
    """Run the transformer once over ``texts`` and pool every requested variant, in the texts' order.

    ``long_texts="truncate"`` keeps the first tokens that fit the model; ``"chunk_mean"``
    splits longer texts into windows that fit, pools each window, and averages the
    window vectors of each text. The texts are tokenised once (``ids``, from ``token_ids``, where the caller has
    them); batches are built from those ids. Under truncate, the first batch is also tokenised by the tokenizer
    itself, and where the two differ (a tokenizer whose ids depend on the special tokens) every batch is.
    """
    import torch

    variants = list(dict.fromkeys(variants))
    ids = token_ids(encoder, texts) if ids is None else ids
    if long_texts == "chunk_mean":
        pieces, owners = _windows(encoder, ids)
        piece_lengths = np.array([len(p) for p in pieces])
    else:
        pieces, owners = _truncated(encoder, ids), np.arange(len(texts))
        piece_lengths = counts_of(ids) if counts is None else counts
    by_tokenizer = False
    outputs: dict[Variant, np.ndarray] = {}
    with torch.inference_mode():
        for number, batch in enumerate(length_sorted_batches(piece_lengths, batch_size)):
            inputs = _tokenized_batch(encoder, texts, batch) if by_tokenizer else _batch_inputs(encoder, pieces, batch)
            if number == 0 and long_texts != "chunk_mean":
                reference = _tokenized_batch(encoder, texts, batch)
                by_tokenizer = not _same_inputs(dict(inputs), dict(reference))
                inputs = reference
            if encoder.device != "cpu":
                inputs = {name: tensor.to(encoder.device) for name, tensor in inputs.items()}
            hidden_states = encoder.transformer(**inputs, output_hidden_states=True).hidden_states
            mask = inputs["attention_mask"]
            selected: dict = {}  # each layer choice's tensor once per batch, for every pooling of it
            for layer_choice, pooling in variants:
                if layer_choice not in selected:
                    selected[layer_choice] = selected_hidden(hidden_states, layer_choice)
                pooled = POOLINGS[pooling](selected[layer_choice], mask).float().cpu().numpy()
                if (layer_choice, pooling) not in outputs:
                    outputs[(layer_choice, pooling)] = np.empty((owners.size, pooled.shape[1]), dtype=np.float32)
                outputs[(layer_choice, pooling)][batch] = pooled
            if on_batch is not None:
                on_batch(int(np.unique(owners[batch]).size) if long_texts == "chunk_mean" else len(batch))
            crash_point("encode_batch")
    if long_texts != "chunk_mean":
        return outputs
    windows_per_text = np.bincount(owners, minlength=len(texts)).astype(np.float32)[:, None]
    averaged = {}
    for variant, per_piece in outputs.items():
        summed = np.zeros((len(texts), per_piece.shape[1]), dtype=np.float64)
        np.add.at(summed, owners, per_piece)
        averaged[variant] = (summed / windows_per_text).astype(np.float32)
    return averaged


def truncated_fraction(counts: np.ndarray, encoder: LoadedEncoder) -> float:
    """Share of texts longer than the model sees (special tokens included): cut under long_texts: truncate."""
    return truncated_share(counts, encoder.max_length, encoder.tokenizer.num_special_tokens_to_add(pair=False))


def windows_per_text(counts: np.ndarray, encoder: LoadedEncoder) -> np.ndarray:
    """How many windows each text is split into under long_texts: chunk_mean (at least one; see ``_windows``)."""
    return window_counts(counts, encoder.max_length, encoder.tokenizer.num_special_tokens_to_add(pair=False))


def truncated_share(counts: np.ndarray, max_length: int, specials: int) -> float:
    return float(np.mean(np.asarray(counts) + specials > max_length))


def window_counts(counts: np.ndarray, max_length: int, specials: int) -> np.ndarray:
    return np.maximum(1, -(-np.asarray(counts) // (max_length - specials)))


def long_text_figures(counts: np.ndarray, max_length: int, specials: int, long_texts: str) -> dict[str, float]:
    """``long_text_info`` from the model's window (max_length, special tokens per text) instead of the model."""
    if long_texts == "chunk_mean":
        windows = window_counts(counts, max_length, specials)
        return {"truncated_fraction": 0.0, "windows_per_text_mean": float(windows.mean()),
                "split_fraction": float(np.mean(windows > 1))}
    return {"truncated_fraction": truncated_share(counts, max_length, specials)}


def long_text_info(counts: np.ndarray, encoder: LoadedEncoder, long_texts: str) -> dict[str, float]:
    """What happened to texts longer than the model sees: cut (truncate), or split into windows (chunk_mean, where
    nothing is cut, so the truncated fraction is 0). With the window it was measured with (``window_max_length``,
    ``window_specials``), so that the same figures can be taken for a subset of the texts without the model."""
    max_length, specials = encoder.max_length, encoder.tokenizer.num_special_tokens_to_add(pair=False)
    return {**long_text_figures(counts, max_length, specials, long_texts), "window_max_length": int(max_length),
            "window_specials": int(specials)}
