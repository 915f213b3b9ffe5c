"""Dataset sources: the settings each accepts and the function that loads it."""

from __future__ import annotations

from typing import Annotated, Callable, Optional, Union

import numpy as np

from pydantic import Field

from harness._settings import Settings
from harness.datasets.corpus import Corpus
from harness.datasets.files import FileSource, file_corpus
from harness.datasets.public import AgNewsSource, TwentyNewsgroupsSource, public_corpus
from harness.datasets.synthetic import SyntheticSource, synthetic_corpus

DatasetSettings = Annotated[
    Union[SyntheticSource, FileSource, TwentyNewsgroupsSource, AgNewsSource], Field(discriminator="source")
]

TokenCounter = Callable[[list[str]], np.ndarray]

LOADERS: dict[str, Callable[..., Corpus]] = {
    "synthetic": synthetic_corpus,
    "file": file_corpus,
    "twenty_newsgroups": public_corpus,
    "ag_news": public_corpus,
}

# Sources whose loading can use the model's tokenizer (to balance lengths as the model counts them).
TOKENIZER_AWARE = frozenset({"twenty_newsgroups", "ag_news"})


def dataset_name(spec: Settings) -> str:
    return getattr(spec, "dataset_name", None) or spec.name


def needs_tokenizer(spec: Settings) -> bool:
    return spec.source in TOKENIZER_AWARE and bool(getattr(spec, "balance_length", False))


def loaded_corpus(spec: Settings, count_tokens: Optional[TokenCounter] = None) -> Corpus:
    """Load the corpus a dataset entry describes; ``count_tokens`` measures lengths where a source balances them."""
    if spec.source in TOKENIZER_AWARE:
        return LOADERS[spec.source](spec, count_tokens)
    return LOADERS[spec.source](spec)


__all__ = ["AgNewsSource", "Corpus", "DatasetSettings", "FileSource", "TwentyNewsgroupsSource", "LOADERS", "SyntheticSource", "dataset_name", "loaded_corpus", "needs_tokenizer"]
