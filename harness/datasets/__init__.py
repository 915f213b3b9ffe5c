"""Dataset sources: the settings each accepts and the function that loads it."""

from __future__ import annotations

from typing import Annotated, Callable, Union

from pydantic import Field

from harness._settings import Settings
from harness.datasets.corpus import Corpus
from harness.datasets.files import FileSource, file_corpus
from harness.datasets.synthetic import SyntheticSource, synthetic_corpus

DatasetSettings = Annotated[Union[SyntheticSource, FileSource], Field(discriminator="source")]

LOADERS: dict[str, Callable[[Settings], Corpus]] = {
    "synthetic": synthetic_corpus,
    "file": file_corpus,
}


def dataset_name(spec: Settings) -> str:
    return getattr(spec, "dataset_name", None) or spec.name


def loaded_corpus(spec: Settings) -> Corpus:
    """Load the corpus a dataset entry describes."""
    return LOADERS[spec.source](spec)


__all__ = ["Corpus", "DatasetSettings", "FileSource", "LOADERS", "SyntheticSource", "dataset_name", "loaded_corpus"]
