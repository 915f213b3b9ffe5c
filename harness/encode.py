"""The forward pass: every pooling x layer variant of a corpus from one pass of the transformer."""

from __future__ import annotations

from typing import Callable, Iterable, Optional

import numpy as np

from harness.layers import LayerChoice, selected_hidden
from harness.models import LoadedEncoder
from harness.pooling import POOLINGS

Variant = tuple[LayerChoice, str]  # (layer selection, pooling)


def token_counts(encoder: LoadedEncoder, texts: list[str]) -> np.ndarray:
    """Tokens per text under the model's tokenizer, special tokens excluded, not truncated."""
    encoded = encoder.tokenizer(texts, add_special_tokens=False, truncation=False, verbose=False)["input_ids"]
    return np.fromiter((len(ids) for ids in encoded), dtype=np.int64, count=len(texts))


def length_sorted_batches(counts: np.ndarray, batch_size: int) -> list[np.ndarray]:
    """Indices grouped into batches of similar length, longest first, so little is spent on padding."""
    order = np.argsort(-counts, kind="stable")
    return [order[start : start + batch_size] for start in range(0, order.size, batch_size)]


def pooled_variants(
    encoder: LoadedEncoder,
    texts: list[str],
    variants: Iterable[Variant],
    *,
    batch_size: int,
    counts: Optional[np.ndarray] = None,
    on_batch: Optional[Callable[[int], None]] = None,
) -> dict[Variant, np.ndarray]:
    """Run the transformer once over ``texts`` and pool every requested variant, in the texts' order."""
    import torch

    variants = list(dict.fromkeys(variants))
    counts = token_counts(encoder, texts) if counts is None else counts
    outputs: dict[Variant, np.ndarray] = {}
    with torch.inference_mode():
        for batch in length_sorted_batches(counts, batch_size):
            inputs = encoder.tokenizer(
                [texts[i] for i in batch], padding=True, truncation=True,
                max_length=encoder.max_length, return_tensors="pt",
            )
            hidden_states = encoder.transformer(**inputs, output_hidden_states=True).hidden_states
            mask = inputs["attention_mask"]
            for layer_choice, pooling in variants:
                pooled = POOLINGS[pooling](selected_hidden(hidden_states, layer_choice), mask).float().numpy()
                if (layer_choice, pooling) not in outputs:
                    outputs[(layer_choice, pooling)] = np.empty((len(texts), pooled.shape[1]), dtype=np.float32)
                outputs[(layer_choice, pooling)][batch] = pooled
            if on_batch is not None:
                on_batch(len(batch))
    return outputs


def truncated_fraction(counts: np.ndarray, encoder: LoadedEncoder) -> float:
    """Share of texts longer than the model sees (special tokens included)."""
    specials = encoder.tokenizer.num_special_tokens_to_add(pair=False)
    return float(np.mean(counts + specials > encoder.max_length))
