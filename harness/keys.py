"""Stable content hashes for settings and arrays.

A key is a SHA-256 over a canonical JSON rendering (sorted keys, no spaces),
so reordering unrelated keys in a sweep never changes it.
"""

from __future__ import annotations

import hashlib
import json
from typing import Any

import numpy as np

KEY_LENGTH = 16


def canonical_json(value: Any) -> str:
    """Render settings as JSON with sorted keys; tuples become lists."""
    return json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=True, default=str)


def settings_key(value: Any) -> str:
    """Short hex key of a JSON-able settings object."""
    return hashlib.sha256(canonical_json(value).encode()).hexdigest()[:KEY_LENGTH]


def chained_key(kind: str, parent: str | None, settings: Any) -> str:
    """Key of a stage: its kind, its own settings and the key of the stage before it."""
    return settings_key({"stage": kind, "parent": parent, "settings": settings})


def array_digest(array: np.ndarray) -> str:
    """SHA-256 of an array's bytes, dtype and shape."""
    array = np.ascontiguousarray(array)
    digest = hashlib.sha256()
    digest.update(str(array.dtype).encode())
    digest.update(repr(array.shape).encode())
    digest.update(array.tobytes())
    return digest.hexdigest()


def texts_digest(texts: list[str], labels: np.ndarray | None) -> str:
    """Fingerprint of a corpus: its texts in order and its gold labels."""
    digest = hashlib.sha256()
    for text in texts:
        encoded = text.encode("utf-8", "surrogatepass")
        digest.update(len(encoded).to_bytes(8, "little"))
        digest.update(encoded)
    digest.update(b"labels" if labels is not None else b"unlabelled")
    if labels is not None:
        digest.update(array_digest(np.asarray(labels)).encode())
    return digest.hexdigest()[:KEY_LENGTH]


def file_sha256(path) -> str:
    """SHA-256 of a file's bytes, read in blocks (a cache entry or a mirror file may be large)."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 22), b""):
            digest.update(block)
    return digest.hexdigest()
