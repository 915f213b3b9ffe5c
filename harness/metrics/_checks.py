"""The one input checker every metric runs first."""

from __future__ import annotations

import numpy as np


def check_same_length(*arrays: np.ndarray, names: tuple[str, ...]) -> tuple[np.ndarray, ...]:
    """Return the arguments as 1-D arrays after checking they are 1-D, non-empty and of one length."""
    checked = []
    for array, name in zip(arrays, names):
        array = np.asarray(array)
        if array.ndim != 1:
            raise ValueError(f"The '{name}' parameter must be 1-D. Got shape {array.shape} instead.")
        if array.size == 0:
            raise ValueError(f"The '{name}' parameter must not be empty.")
        checked.append(array)
    sizes = {a.shape[0] for a in checked}
    if len(sizes) > 1:
        got = ", ".join(f"{n}={a.shape[0]}" for a, n in zip(checked, names))
        raise ValueError(f"The parameters {', '.join(names)} must have one length. Got {got} instead.")
    return tuple(checked)


def check_finite_labels(*arrays: np.ndarray, names: tuple[str, ...]) -> None:
    """Labels of a float dtype must be finite: NaN would be counted as one more class (scikit-learn refuses it)."""
    for array, name in zip(arrays, names):
        if np.issubdtype(array.dtype, np.floating) and not np.all(np.isfinite(array)):
            raise ValueError(f"The '{name}' parameter must not contain NaN or infinity. "
                             f"Got {int((~np.isfinite(array)).sum())} such values instead.")


def check_positive(values: np.ndarray, name: str) -> np.ndarray:
    values = np.asarray(values, dtype=np.float64)
    if not np.all(values > 0):
        raise ValueError(f"The '{name}' parameter must be > 0 everywhere. Got minimum {values.min()} instead.")
    return values
