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
    """Labels must not hold NaN or infinity (as floats, or as Python floats in an object array) nor complex
    numbers: scikit-learn refuses them, and a contingency table would count each NaN as a class of its own."""
    for array, name in zip(arrays, names):
        if array.dtype.kind == "c":
            raise ValueError(f"The '{name}' parameter must not hold complex numbers. Got dtype {array.dtype} instead.")
        if array.dtype.kind == "f":
            bad = int((~np.isfinite(array)).sum())
        elif array.dtype.kind == "O":
            bad = sum(1 for value in array.tolist()
                      if isinstance(value, (float, np.floating)) and not np.isfinite(value))
        else:
            continue
        if bad:
            raise ValueError(f"The '{name}' parameter must not contain NaN or infinity. Got {bad} such values instead.")


def check_positive(values: np.ndarray, name: str) -> np.ndarray:
    values = np.asarray(values, dtype=np.float64)
    if not np.all(values > 0):
        raise ValueError(f"The '{name}' parameter must be > 0 everywhere. Got minimum {values.min()} instead.")
    return values
