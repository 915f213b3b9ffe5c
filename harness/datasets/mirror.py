"""Building an offline mirror of the public datasets (an edge: network in, files out).

On a machine with a network, ``harness datasets mirror --out DIR`` fetches each public dataset
through the same route the loaders use and writes the exact file the loaders read from a mirror
(``MIRROR_FILES``), with a ``manifest.json`` of row counts and SHA-256 digests, so a team can copy
the folder to machines without a network and set ``HARNESS_DATA_DIR``.

Nothing is half-written: every dataset is fetched before any file is written, files are written
under temporary names and renamed into place only when all of them are complete, and the manifest
goes last.
"""

from __future__ import annotations

import datetime as _dt
import difflib
import json
import os
import uuid
from pathlib import Path
from typing import Callable, Optional, Sequence

import pandas as pd

from harness.datasets.public import MIRROR_FILES, PUBLIC_ROUTES, SPLITS, RouteFailure
from harness.errors import DataError
from harness.keys import file_sha256

MANIFEST = "manifest.json"
COLUMNS = ("text", "label", "label_name", "split")


def mirror_frame(table: pd.DataFrame, source: str) -> pd.DataFrame:
    """The four mirror columns with their types, train rows before test rows (the layout loaders expect)."""
    missing = [c for c in COLUMNS if c not in table.columns]
    if missing:
        raise DataError(f"dataset '{source}': the public route gave no column {', '.join(missing)}")
    frame = table.loc[:, list(COLUMNS)].copy()
    frame["text"] = frame.text.astype(str)
    frame["label"] = frame.label.astype("int64")
    frame["label_name"] = frame.label_name.astype(str)
    frame["split"] = pd.Categorical(frame.split.astype(str), categories=list(SPLITS), ordered=True)
    frame = frame.sort_values("split", kind="stable").reset_index(drop=True)
    frame["split"] = frame.split.astype(str)
    return frame


def manifest_entry(frame: pd.DataFrame, path: Path, route: str) -> dict:
    return {
        "file": path.name,
        "route": route,
        "rows": int(len(frame)),
        "rows_per_split": {s: int((frame.split == s).sum()) for s in SPLITS if (frame.split == s).any()},
        "classes": int(frame.label.nunique()),
        "bytes": path.stat().st_size,
        "sha256": file_sha256(path),
    }


def _read_manifest(folder: Path) -> dict:
    path = folder / MANIFEST
    if not path.is_file():
        return {}
    try:
        return json.loads(path.read_text()).get("datasets", {})
    except (OSError, ValueError, AttributeError):
        return {}  # an unreadable manifest is rewritten from what this run writes


def build_mirror(out: Path, names: Sequence[str], routes: Optional[dict[str, Callable[[], pd.DataFrame]]] = None,
                 progress: Callable[[str], None] = lambda message: None) -> dict:
    """Fetch ``names`` through their public routes and write them, with the manifest, into ``out``.

    Returns the manifest. Raises DataError, with nothing written, when any route fails.
    """
    from harness import __version__

    routes = PUBLIC_ROUTES if routes is None else routes
    unknown = [n for n in names if n not in MIRROR_FILES]
    if unknown:
        hint = difflib.get_close_matches(unknown[0], list(MIRROR_FILES), n=1)
        did_you_mean = f" (did you mean '{hint[0]}'?)" if hint else ""
        raise DataError(f"no public dataset named {', '.join(map(repr, unknown))}; expected one of "
                        f"{', '.join(MIRROR_FILES)}{did_you_mean}")
    if out.exists() and not out.is_dir():
        raise DataError(f"--out: {out} exists and is not a folder")
    frames = {}
    for name in names:
        progress(f"fetching {name} through its public route")
        try:
            table = routes[name]()
        except RouteFailure as failure:
            raise DataError(f"dataset '{name}': the public route failed: {failure}; nothing was written") from None
        frames[name] = (mirror_frame(table, name), table.attrs.get("route", "public"))

    created = not out.exists()
    out.mkdir(parents=True, exist_ok=True)
    token = f"{os.getpid()}-{uuid.uuid4().hex[:8]}"
    written: dict[str, Path] = {}
    entries = {}
    try:
        for name, (frame, route) in frames.items():
            temporary = out / f".{MIRROR_FILES[name]}.{token}.tmp"
            written[name] = temporary
            frame.to_parquet(temporary, index=False, compression="zstd")
            entries[name] = {**manifest_entry(frame, temporary, route), "file": MIRROR_FILES[name]}
        now = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
        datasets = {**_read_manifest(out), **{n: {**e, "created": now} for n, e in entries.items()}}
        manifest = {"format": 1, "created_by": f"harness {__version__}", "datasets": dict(sorted(datasets.items()))}
        manifest_temporary = out / f".{MANIFEST}.{token}.tmp"
        written["manifest"] = manifest_temporary
        manifest_temporary.write_text(json.dumps(manifest, indent=2) + "\n")
    except BaseException as err:
        for path in written.values():
            path.unlink(missing_ok=True)
        if created:
            out.rmdir()
        if isinstance(err, OSError):
            raise DataError(f"--out: cannot write the mirror in {out}: {err.strerror or err}; nothing was written") from None
        raise
    for name in frames:
        os.replace(written[name], out / MIRROR_FILES[name])
    os.replace(written["manifest"], out / MANIFEST)
    return manifest
