"""20 Newsgroups and AG News: the usual public route where a network exists, a local Parquet mirror where not.

Mirror files (``twenty_newsgroups.parquet``, ``ag_news.parquet``) hold the columns
text, label, label_name and split. The mirror folder is the sweep's ``data_dir``
or the ``HARNESS_DATA_DIR`` environment variable.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import TYPE_CHECKING, Callable, Literal, Optional

import numpy as np
from pydantic import Field, PositiveInt, ValidationInfo, field_validator, model_validator

from harness._settings import Settings, relative_to_sweep
from harness.datasets.corpus import Corpus, balanced_length_indices, per_class_indices, stratified_indices
from harness.datasets.newsgroups_text import PARTS, stripped_message
from harness.errors import DataError

if TYPE_CHECKING:  # pandas is imported when a table is read, so that parsing a sweep stays fast
    import pandas as pd

DATA_DIR_VARIABLE = "HARNESS_DATA_DIR"
MIRROR_FILES = {"twenty_newsgroups": "twenty_newsgroups.parquet", "ag_news": "ag_news.parquet"}
SPLITS = ("train", "test")


class PublicSource(Settings):
    split: Literal["train", "test", "all"] = "test"
    data_dir: Optional[Path] = None
    per_class: Optional[PositiveInt] = None
    balance_length: bool = False
    # Whose tokenizer measures the lengths that balance_length balances: a model name or folder, or "words";
    # default: the sweep's first model. A citation names it, so that its one-model sweep draws the same texts.
    length_tokenizer: Optional[str] = Field(None, min_length=1)
    sample: Optional[PositiveInt] = None
    seed: int = 0

    @field_validator("data_dir")
    @classmethod
    def _resolved(cls, path: Optional[Path], info: ValidationInfo) -> Optional[Path]:
        if path is None:
            return None
        resolved = relative_to_sweep(path, info)
        if not resolved.is_dir():
            raise ValueError(f"no such folder: {resolved}")
        return resolved

    @model_validator(mode="after")
    def _tokenizer_balances(self) -> "PublicSource":
        if self.length_tokenizer is not None and not self.balance_length:
            raise ValueError("length_tokenizer applies only with balance_length: true")
        return self

    @property
    def dataset_name(self) -> str:
        return self.name

    def mirror_dir(self) -> Optional[Path]:
        if self.data_dir is not None:
            return self.data_dir
        from_environment = os.environ.get(DATA_DIR_VARIABLE)
        return Path(from_environment).expanduser().resolve() if from_environment else None


class TwentyNewsgroupsSource(PublicSource):
    source: Literal["twenty_newsgroups"]
    name: str = "twenty_newsgroups"
    remove: list[Literal["headers", "footers", "quotes"]] = Field(default_factory=list)


class AgNewsSource(PublicSource):
    source: Literal["ag_news"]
    name: str = "ag_news"


def _offline() -> bool:
    return any(os.environ.get(v, "").lower() in ("1", "true", "yes") for v in ("HF_HUB_OFFLINE", "HF_DATASETS_OFFLINE"))


def mirror_table(source: str, folder: Path) -> Optional[pd.DataFrame]:
    import pandas as pd

    path = folder / MIRROR_FILES[source]
    if not path.is_file():
        return None
    try:
        table = pd.read_parquet(path, columns=["text", "label", "label_name", "split"])
    except Exception as err:  # pyarrow raises several types; the user needs the file and the reason
        raise DataError(f"{path}: cannot read the mirror: {str(err).splitlines()[0]}") from None
    table.attrs["route"] = f"mirror:{path}"
    return table


class RouteFailure(Exception):
    """A public route could not deliver its dataset; the message says why, in a few words (no 'offline' guess)."""


def _first_line(err: BaseException) -> str:
    text = str(err).strip()
    return text.splitlines()[0] if text else type(err).__name__


def _causes(err: BaseException) -> list[BaseException]:
    chain, seen = [], set()
    while err is not None and id(err) not in seen:
        seen.add(id(err))
        chain.append(err)
        err = err.__cause__ or err.__context__
    return chain


def hub_failure_reason(err: BaseException) -> str:
    """Why a ``datasets.load_dataset`` call failed, from the error the library raised.

    The datasets library re-raises hub failures as a ConnectionError whose message names the cause
    ("Couldn't reach 'x' on the Hub (OfflineModeIsEnabled)"), so both the exception chain and the
    message are read.
    """
    chain = _causes(err)
    if any(isinstance(e, ImportError) for e in chain):
        return ("the 'datasets' package is not installed; it is a dependency of harness: reinstall harness "
                "(pip install -e .) or pip install 'datasets>=5.2,<6'")
    if any(type(e).__name__ == "OfflineModeIsEnabled" or "OfflineModeIsEnabled" in str(e) for e in chain):
        return ("offline mode is on (HF_HUB_OFFLINE or HF_DATASETS_OFFLINE is set) and the datasets cache does not "
                "hold it")
    answered = next((e for e in chain if isinstance(getattr(getattr(e, "response", None), "status_code", None), int)), None)
    if answered is not None:
        return f"HTTP {answered.response.status_code} from the Hugging Face hub: {_first_line(answered)}"
    if type(err).__name__ == "DatasetNotFoundError":
        return f"not found on the Hugging Face hub: {_first_line(err)}"
    if any(isinstance(e, (ConnectionError, TimeoutError)) or type(e).__name__ in ("ConnectError", "ConnectTimeout")
           for e in chain):
        return f"cannot reach the Hugging Face hub (no network, or a proxy in the way): {_first_line(err)}"
    return f"{type(err).__name__}: {_first_line(err)}"


def download_failure_reason(err: BaseException, offline: bool, data_home: str) -> str:
    """Why scikit-learn's 20 Newsgroups fetcher failed."""
    import urllib.error

    if offline and isinstance(err, OSError) and "not found" in str(err):
        return (f"downloads are off (HF_HUB_OFFLINE or HF_DATASETS_OFFLINE is set) and scikit-learn's data folder "
                f"{data_home} does not hold it")
    if isinstance(err, urllib.error.HTTPError):
        return f"HTTP {err.code} from {err.url}: {err.reason}"
    if isinstance(err, urllib.error.URLError):
        return f"cannot reach the download server (no network, or a proxy in the way): {err.reason}"
    return f"{type(err).__name__}: {_first_line(err)}"


def _public_twenty_newsgroups() -> pd.DataFrame:
    import pandas as pd
    from sklearn.datasets import fetch_20newsgroups, get_data_home

    offline = _offline()
    parts = []
    for split in SPLITS:
        try:
            bunch = fetch_20newsgroups(subset=split, remove=(), download_if_missing=not offline)
        except Exception as err:  # the fetcher raises OSError, URLError, HTTPError...: say which
            raise RouteFailure(download_failure_reason(err, offline, get_data_home())) from None
        parts.append(pd.DataFrame({"text": bunch.data, "label": bunch.target,
                                   "label_name": [bunch.target_names[i] for i in bunch.target], "split": split}))
    table = pd.concat(parts, ignore_index=True)
    table.attrs["route"] = "scikit-learn:fetch_20newsgroups"
    return table


AG_NEWS_HUB_ID = "ag_news"


def hub_table(loaded, hub_id: str) -> pd.DataFrame:
    """The train and test splits of a loaded ``DatasetDict`` with a text column and a class-label column."""
    import pandas as pd

    found = {split: sorted(loaded[split].column_names) for split in loaded}
    label_names = None
    if all(s in found for s in SPLITS) and all({"text", "label"} <= set(found[s]) for s in SPLITS):
        label_names = getattr(loaded["train"].features["label"], "names", None)
    if not label_names:
        raise RouteFailure(f"unexpected schema from huggingface:{hub_id}: expected splits train and test with columns "
                           f"text and label (a class label); got {found}")
    parts = [pd.DataFrame({"text": loaded[s]["text"], "label": loaded[s]["label"], "split": s}) for s in SPLITS]
    table = pd.concat(parts, ignore_index=True)
    table["label_name"] = [label_names[i] for i in table.label]
    table.attrs["route"] = f"huggingface:{hub_id}"
    return table


def _public_ag_news() -> pd.DataFrame:
    try:
        from datasets import load_dataset

        loaded = load_dataset(AG_NEWS_HUB_ID)
    except Exception as err:  # the library raises ConnectionError, HTTP errors, ImportError...: say which
        raise RouteFailure(hub_failure_reason(err)) from None
    return hub_table(loaded, AG_NEWS_HUB_ID)


PUBLIC_ROUTES: dict[str, Callable[[], pd.DataFrame]] = {
    "twenty_newsgroups": _public_twenty_newsgroups,
    "ag_news": _public_ag_news,
}
MIRROR_COMMAND = "harness datasets mirror --out DIR"


def source_table(spec: PublicSource) -> pd.DataFrame:
    """The whole dataset from the mirror when one is set and holds it, else from the public route."""
    folder = spec.mirror_dir()
    table = mirror_table(spec.source, folder) if folder is not None else None
    if table is not None:
        return table
    try:
        return PUBLIC_ROUTES[spec.source]()
    except RouteFailure as failure:
        if folder is None:
            mirror = f"no mirror ({DATA_DIR_VARIABLE} is not set and the entry has no data_dir:)"
        else:
            mirror = f"no mirror ({folder / MIRROR_FILES[spec.source]} does not exist)"
        raise DataError(
            f"dataset '{spec.source}': {mirror}, and the public route failed: {failure}; on a machine with a network, "
            f"build a mirror with `{MIRROR_COMMAND} {spec.source}` and set {DATA_DIR_VARIABLE}=DIR (or data_dir: DIR)"
        ) from None


def _split_rows(table: pd.DataFrame, spec: PublicSource) -> pd.DataFrame:
    present = set(table.split.unique())
    wanted = set(SPLITS) if spec.split == "all" else {spec.split}
    if not wanted <= present:
        missing = ", ".join(sorted(wanted - present))
        raise DataError(
            f"dataset '{spec.source}': split '{spec.split}' needs the {missing} rows, which {table.attrs['route']} does not hold "
            f"(it has: {', '.join(sorted(present))}); use split: {' or '.join(sorted(present))}, or load it where the network is reachable"
        )
    return table[table.split.isin(wanted)].reset_index(drop=True)


def word_counts(texts: list[str]) -> np.ndarray:
    """Words per text (runs of word characters), at least 1: the length measure used to balance classes."""
    import re

    pattern = re.compile(r"\w+")
    return np.array([max(1, len(pattern.findall(t))) for t in texts])


def public_corpus(spec: PublicSource, count_tokens: Optional[Callable[[list[str]], np.ndarray]] = None) -> Corpus:
    """Load, split, strip, cap, balance and sample a public dataset, in that order.

    ``balance_length`` balances the lengths that ``count_tokens`` measures (the model's
    tokenizer, so that the balance holds for the length the scores use); without it,
    word counts.
    """
    full = source_table(spec)
    table = _split_rows(full, spec)
    texts = table.text.tolist()
    removed = tuple(p for p in PARTS if p in getattr(spec, "remove", ()))
    dropped = 0
    if removed:
        texts = [stripped_message(t, removed) for t in texts]
        keep = np.array([bool(t.strip()) for t in texts])
        dropped = int((~keep).sum())
        texts = [t for t, k in zip(texts, keep) if k]
        table = table[keep].reset_index(drop=True)
    labels = table.label.to_numpy(np.int64)
    order = np.arange(len(texts))
    if spec.per_class is not None:
        order = order[per_class_indices(labels[order], spec.per_class, spec.seed)]
    notes: dict = {"dropped_empty_after_remove": dropped} if removed else {}
    if spec.balance_length:
        measure = count_tokens or word_counts
        notes["balanced_by"] = "tokens" if count_tokens else "words"
        order = order[balanced_length_indices(measure([texts[i] for i in order]), labels[order], spec.seed)]
    if spec.sample is not None:
        order = order[stratified_indices(labels[order], spec.sample, spec.seed)]
    names = full.drop_duplicates("label").sort_values("label").label_name.tolist()
    return Corpus(
        name=spec.dataset_name,
        texts=[texts[i] for i in order],
        ids=np.array([f"{table.split[i]}-{i}" for i in order]),
        labels=labels[order],
        label_names=tuple(names),
        source=table.attrs.get("route", full.attrs.get("route", "")),
        notes=notes,
    )
