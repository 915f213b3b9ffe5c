"""The user's own vectors (family ``precomputed``): read, checked against the dataset, put in the dataset's order.

A ``.npy`` holds one row per text, in the dataset's order, or in the order of an ids file
(one id per line); a Parquet file holds an id column and a vector column (a list of
numbers per row). With ids, every text of the dataset needs a row and rows for other ids
are ignored, so one file can serve samples of a larger corpus. Every problem is one line
naming the file and the row (rows are counted from 0, lines of an ids file from 1).
Arrays are read with ``allow_pickle=False``.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Optional

import numpy as np

from harness.errors import DataError

PRECOMPUTED_POOLING = "precomputed"  # the family's one way to make a text vector: the user already made it
SUFFIXES = (".npy", ".parquet")


@dataclass(frozen=True)
class VectorsSource:
    """Where a precomputed model's vectors are, and how their rows are named."""

    path: Path
    ids: Optional[Path] = None  # .npy only: one id per line, in the array's row order
    id_column: str = "id"  # Parquet only
    vector_column: str = "vector"  # Parquet only


def vectors_source(spec) -> VectorsSource:
    """The vectors file of a model entry (the sweep's ModelSettings) of family precomputed."""
    return VectorsSource(Path(spec.vectors), spec.ids, spec.id_column or "id", spec.vector_column or "vector")


def _numeric_matrix(matrix: np.ndarray, where: Path) -> np.ndarray:
    if matrix.ndim != 2:
        raise DataError(f"{where}: expected a 2-D array of numbers (one row per text), got shape {matrix.shape}")
    if not (np.issubdtype(matrix.dtype, np.floating) or np.issubdtype(matrix.dtype, np.integer)):
        raise DataError(f"{where}: expected numbers, got dtype {matrix.dtype}")
    if matrix.shape[1] == 0:
        raise DataError(f"{where}: the vectors have no columns")
    return matrix


def _npy_matrix(path: Path, mmap: bool = False) -> np.ndarray:
    try:
        matrix = np.load(path, mmap_mode="r" if mmap else None, allow_pickle=False)
    except (ValueError, OSError, EOFError) as err:
        raise DataError(f"{path}: not a readable .npy array of numbers ({str(err).splitlines()[0]})") from None
    return _numeric_matrix(matrix, path)


def _parquet_column(source: VectorsSource, name: str):
    import pyarrow.parquet as pq

    try:
        schema = pq.read_schema(source.path)
    except Exception as err:  # pyarrow raises several types for files that are not Parquet
        raise DataError(f"{source.path}: not a readable Parquet file ({str(err).splitlines()[0]})") from None
    if name not in schema.names:
        raise DataError(f"{source.path}: no column '{name}'; the columns are {', '.join(schema.names)}")
    return pq.read_table(source.path, columns=[name]).column(name).combine_chunks()


def _parquet_matrix(source: VectorsSource) -> np.ndarray:
    import pyarrow as pa
    import pyarrow.compute as pc

    column = _parquet_column(source, source.vector_column)
    if not (pa.types.is_list(column.type) or pa.types.is_large_list(column.type)
            or pa.types.is_fixed_size_list(column.type)):
        raise DataError(f"{source.path}: column '{source.vector_column}' holds {column.type}; expected a list of "
                        "numbers per row")
    if column.null_count:
        row = int(np.flatnonzero(column.is_null().to_numpy(zero_copy_only=False))[0])
        raise DataError(f"{source.path}: row {row}: no vector (null)")
    lengths = pc.list_value_length(column).to_numpy(zero_copy_only=False)
    if lengths.size and (lengths != lengths[0]).any():
        row = int(np.flatnonzero(lengths != lengths[0])[0])
        raise DataError(f"{source.path}: row {row}: {lengths[row]} values; expected {lengths[0]} like row 0 "
                        "(every vector needs the same width)")
    values = pc.list_flatten(column)
    if not (pa.types.is_floating(values.type) or pa.types.is_integer(values.type)):
        raise DataError(f"{source.path}: column '{source.vector_column}' holds lists of {values.type}; expected numbers")
    if values.null_count:
        flat = int(np.flatnonzero(values.is_null().to_numpy(zero_copy_only=False))[0])
        raise DataError(f"{source.path}: row {flat // lengths[0]}: value {flat % lengths[0]} is missing (null)")
    width = int(lengths[0]) if lengths.size else 0
    return _numeric_matrix(values.to_numpy(zero_copy_only=False).reshape(len(column), width), source.path)


def vectors_width(source: VectorsSource) -> int:
    """The width of the vectors, read without loading them all where the format allows."""
    if source.path.suffix == ".npy":
        return int(_npy_matrix(source.path, mmap=True).shape[1])
    return int(_parquet_matrix(source).shape[1])


def _row_ids(source: VectorsSource, n_rows: int) -> Optional[list[str]]:
    """The id of each row, or None when rows follow the dataset's order."""
    if source.path.suffix == ".parquet":
        return [str(v) for v in _parquet_column(source, source.id_column).to_pylist()]
    if source.ids is None:
        return None
    try:
        lines = source.ids.read_text(encoding="utf-8").splitlines()
    except (OSError, UnicodeDecodeError) as err:
        raise DataError(f"{source.ids}: cannot read the ids file ({err})") from None
    if len(lines) != n_rows:
        raise DataError(f"{source.ids}: {len(lines)} ids for {n_rows} rows in {source.path}; expected one id per line, "
                        "in the array's row order")
    return lines


def read_vectors(source: VectorsSource) -> tuple[np.ndarray, Optional[list[str]]]:
    """The vectors (float32) and each row's id (None without ids), checked: one width, finite values, unique ids."""
    matrix = _npy_matrix(source.path) if source.path.suffix == ".npy" else _parquet_matrix(source)
    finite = np.isfinite(matrix)
    if not finite.all():
        row, column = (int(i) for i in np.argwhere(~finite)[0])
        raise DataError(f"{source.path}: row {row}: value {column} is {matrix[row, column]}; vectors must be finite")
    ids = _row_ids(source, matrix.shape[0])
    if ids is not None:
        first: dict[str, int] = {}
        for row, value in enumerate(ids):
            if value in first:
                where = f"{source.ids}: line {row + 1}" if source.ids is not None else f"{source.path}: row {row}"
                seen = f"line {first[value] + 1}" if source.ids is not None else f"row {first[value]}"
                raise DataError(f"{where}: id {value!r} appears twice (first at {seen})")
            first[value] = row
    return matrix.astype(np.float32, copy=False), ids


def aligned_vectors(source: VectorsSource, dataset_ids: np.ndarray, dataset: str) -> np.ndarray:
    """The vectors in the dataset's order; raises DataError (file and row) when they do not fit the dataset."""
    matrix, ids = read_vectors(source)
    if ids is None:
        if matrix.shape[0] != len(dataset_ids):
            raise DataError(f"{source.path}: {matrix.shape[0]} rows for {len(dataset_ids)} texts in dataset '{dataset}'; "
                            "expected one row per text in the dataset's order, or ids (an ids file beside a .npy, "
                            "an id column in Parquet)")
        return matrix
    row_of = {value: row for row, value in enumerate(ids)}
    rows = np.empty(len(dataset_ids), dtype=np.int64)
    for position, value in enumerate(dataset_ids):
        row = row_of.get(str(value))
        if row is None:
            raise DataError(f"{source.ids or source.path}: no row for id {str(value)!r} (text {position} of dataset "
                            f"'{dataset}')")
        rows[position] = row
    return matrix[rows]
