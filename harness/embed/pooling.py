"""Pooling: one vector per text from its token vectors.

Every function takes token vectors ``hidden`` of shape (batch, tokens, dim) and
the attention mask of shape (batch, tokens), 1 for real tokens and 0 for
padding, and returns (batch, dim). Padding never contributes. The functions use
tensor methods only, so importing this module does not import torch.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Callable

if TYPE_CHECKING:
    import torch

PoolingFn = Callable[["torch.Tensor", "torch.Tensor"], "torch.Tensor"]


def _float_mask(hidden: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    return mask.unsqueeze(-1).to(hidden.dtype)


def _token_counts(mask: torch.Tensor) -> torch.Tensor:
    return mask.sum(dim=1, keepdim=True).clamp(min=1).float()


def cls_pooled(hidden: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    """The first token's vector ([CLS] for BERT-style tokenizers)."""
    return hidden[:, 0]


def mean_pooled(hidden: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    """Average of the real tokens' vectors."""
    summed = (hidden * _float_mask(hidden, mask)).sum(dim=1)
    return summed / _token_counts(mask).to(hidden.dtype)


def max_pooled(hidden: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    """Per-dimension maximum over real tokens; padding is set to -inf first."""
    padded = hidden.masked_fill(mask.unsqueeze(-1) == 0, float("-inf"))
    return padded.max(dim=1).values


def mean_sqrt_len_pooled(hidden: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    """Sum of the real tokens' vectors divided by the square root of their count."""
    summed = (hidden * _float_mask(hidden, mask)).sum(dim=1)
    return summed / _token_counts(mask).sqrt().to(hidden.dtype)


def weighted_mean_pooled(hidden: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    """Position-weighted mean: the i-th real token weighs i (later tokens count more)."""
    positions = (mask.cumsum(dim=1) * mask).unsqueeze(-1).to(hidden.dtype)
    return (hidden * positions).sum(dim=1) / positions.sum(dim=1).clamp(min=1)


def last_token_pooled(hidden: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    """The last real token's vector, for right or left padding alike."""
    # The running count peaks at the last real token; padding after it scores 0.
    last = (mask.cumsum(dim=1) * mask).argmax(dim=1)
    return hidden[last.new_tensor(range(hidden.shape[0])), last]


POOLINGS: dict[str, PoolingFn] = {
    "cls": cls_pooled,
    "mean": mean_pooled,
    "max": max_pooled,
    "mean_sqrt_len": mean_sqrt_len_pooled,
    "weighted_mean": weighted_mean_pooled,
    "last_token": last_token_pooled,
}

# Poolings that differ from "mean" only by a positive factor per row: under a
# scale-invariant path they give the same clusters.
MEAN_SCALED = frozenset({"mean", "mean_sqrt_len"})
