"""The user's own labelled or unlabelled files: CSV, Parquet, JSON lines."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Any, Literal, Optional

import numpy as np
from pydantic import PositiveInt, ValidationInfo, field_validator, model_validator

from harness._settings import Settings, relative_to_sweep
from harness.datasets.corpus import Corpus, random_indices, stratified_indices
from harness.errors import DataError

if TYPE_CHECKING:  # pandas is imported when a file is read, so that parsing a sweep stays fast
    import pandas as pd

SUFFIX_FORMATS = {".csv": "csv", ".parquet": "parquet", ".pq": "parquet", ".jsonl": "jsonl", ".ndjson": "jsonl"}


class FileSource(Settings):
    source: Literal["file"]
    path: Path
    name: Optional[str] = None
    format: Optional[Literal["csv", "parquet", "jsonl"]] = None
    text_column: str = "text"
    label_column: Optional[str] = "label"
    id_column: Optional[str] = None
    sample: Optional[PositiveInt] = None
    seed: int = 0  # seeds the subsample; the same name as for every other source
    max_chars: PositiveInt = 1_000_000  # longer texts are refused: almost surely a broken file or column

    @model_validator(mode="before")
    @classmethod
    def _renamed_keys(cls, data: Any) -> Any:
        if isinstance(data, dict) and "sample_seed" in data:
            raise ValueError(f"'sample_seed' is now 'seed', the name every source uses; write seed: {data['sample_seed']}")
        return data

    @field_validator("path")
    @classmethod
    def _exists(cls, path: Path, info: ValidationInfo) -> Path:
        resolved = relative_to_sweep(path, info)
        if not resolved.is_file():
            raise ValueError(f"no such file: {resolved}")
        if resolved.suffix.lower() not in SUFFIX_FORMATS:
            raise ValueError(f"cannot tell the format of {resolved.name}; expected one of {', '.join(SUFFIX_FORMATS)}")
        return resolved

    @property
    def dataset_name(self) -> str:
        return self.name or self.path.stem


def _read_table(path: Path, file_format: str) -> pd.DataFrame:
    import pandas as pd

    try:
        if file_format == "csv":
            return pd.read_csv(path, dtype=str, keep_default_na=False, encoding="utf-8")
        if file_format == "jsonl":
            return pd.read_json(path, lines=True, dtype=False, encoding="utf-8")
        return pd.read_parquet(path)
    except UnicodeDecodeError as err:
        raise DataError(f"{path}: not valid UTF-8 at byte {err.start}; re-save the file as UTF-8") from None
    except Exception as err:  # each reader raises its own types; the user needs the file and the reason
        reason = str(err).splitlines()[0] if str(err) else type(err).__name__
        raise DataError(f"{path}: cannot read as {file_format}: {reason}") from None


def _column(frame: pd.DataFrame, column: str, key: str, path: Path) -> pd.Series:
    if column not in frame.columns:
        found = ", ".join(map(str, frame.columns[:10]))
        raise DataError(f"{path}: {key}: no column '{column}'; the file has: {found}")
    return frame[column]


def file_corpus(spec: FileSource) -> Corpus:
    """Read, check and optionally subsample the file. Empty texts and empty labels are refused, not dropped."""
    path = spec.path
    frame = _read_table(path, spec.format or SUFFIX_FORMATS[path.suffix.lower()])
    if frame.empty:
        raise DataError(f"{path}: the file has no rows")
    raw_texts = _column(frame, spec.text_column, "text_column", path)
    empty = raw_texts.isna() | (raw_texts.astype(str).str.strip() == "")
    if empty.any():
        first = int(np.flatnonzero(empty.to_numpy())[0])
        raise DataError(
            f"{path}: text_column '{spec.text_column}': {int(empty.sum())} of {len(frame)} rows have empty text "
            f"(first at row {first}); remove or fill them"
        )
    texts = raw_texts.astype(str).tolist()
    lengths = np.fromiter((len(t) for t in texts), dtype=np.int64, count=len(texts))
    if lengths.max() > spec.max_chars:
        row = int(lengths.argmax())
        raise DataError(f"{path}: text_column '{spec.text_column}': row {row} has {lengths[row]:,} characters, over "
                        f"max_chars={spec.max_chars:,}; check the file, or raise max_chars")

    labels = label_names = None
    if spec.label_column is not None:
        if spec.label_column not in frame.columns and "label_column" not in spec.model_fields_set:
            found = ", ".join(map(str, frame.columns[:10]))
            raise DataError(f"{path}: label_column: no column '{spec.label_column}' (the default); for a file without "
                            f"labels write label_column: null in this dataset entry, or name the column that holds them "
                            f"(label_column: NAME); the file has: {found}")
        raw_labels = _column(frame, spec.label_column, "label_column", path)
        # A CSV's empty cell reads as "" (missing values are not converted), JSON's null and Parquet's null as NaN;
        # either would become a class of its own (named "" or "nan"), so both are refused, as empty texts are.
        empty_labels = raw_labels.isna() | (raw_labels.astype(str).str.strip() == "")
        if empty_labels.any():
            first = int(np.flatnonzero(empty_labels.to_numpy())[0])
            raise DataError(
                f"{path}: label_column '{spec.label_column}': {int(empty_labels.sum())} of {len(frame)} rows have an "
                f"empty label (first at row {first}); remove or fill them, or set label_column: null"
            )
        names, labels = np.unique(raw_labels.astype(str).to_numpy(), return_inverse=True)
        if names.size < 2:
            raise DataError(f"{path}: label_column '{spec.label_column}': only one class ('{names[0]}'); scores need at least 2")
        label_names = tuple(names.tolist())
        labels = labels.astype(np.int64)

    if spec.id_column is not None:
        ids = _column(frame, spec.id_column, "id_column", path).astype(str).to_numpy()
        if len(set(ids.tolist())) < len(ids):
            raise DataError(f"{path}: id_column '{spec.id_column}': ids are not unique")
    else:
        ids = np.array([str(i) for i in range(len(frame))])

    if spec.sample is not None:
        keep = (
            stratified_indices(labels, spec.sample, spec.seed)
            if labels is not None
            else random_indices(len(texts), spec.sample, spec.seed)
        )
        texts = [texts[i] for i in keep]
        ids = ids[keep]
        labels = None if labels is None else labels[keep]
    return Corpus(name=spec.dataset_name, texts=texts, ids=ids, labels=labels, label_names=label_names, source=str(path))
