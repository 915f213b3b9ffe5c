"""A new local SQLite tracking store starts in write-ahead-log mode.

MLflow's SQL store commits once or more per call (a run's creation, its params, its metrics, its end). In SQLite's
default rollback-journal mode every commit creates, syncs and deletes a journal file besides syncing the database;
in write-ahead-log (WAL) mode a commit appends to one log and syncs it once. Durability is unchanged (synchronous
stays FULL), readers such as the MLflow UI no longer block the writer, and a new store with 96 runs logged takes
about a third less time here (``store_wal_over_rollback`` in benchmarks/README.md: 0.67). The mode is stored in the database file, so it is set once, on a
file created for the purpose before MLflow creates its tables; an existing store keeps the mode it has.

SQLite's documentation says WAL does not work over a network filesystem, so a store is created in WAL mode only
where the filesystem holding it is known to be local (read from /proc/self/mounts; elsewhere nothing is changed).
"""

from __future__ import annotations

import sqlite3
from pathlib import Path

# Filesystems of one machine's own disks or memory, where SQLite's shared-memory index for WAL works.
LOCAL_FILESYSTEMS = frozenset({
    "ext2", "ext3", "ext4", "xfs", "btrfs", "zfs", "f2fs", "jfs", "reiserfs", "bcachefs", "tmpfs", "ramfs", "overlay",
})
MOUNTS = Path("/proc/self/mounts")


def sqlite_path(tracking_uri: str) -> Path | None:
    """The database file of a ``sqlite:///`` tracking URI, as SQLAlchemy reads it (``sqlite:////abs/x.db`` an
    absolute path, ``sqlite:///x.db`` one relative to the working directory); None for any other URI or an
    in-memory database."""
    prefix = "sqlite:///"
    if not tracking_uri.startswith(prefix):
        return None
    path = tracking_uri[len(prefix):].split("?", 1)[0]
    return None if path in ("", ":memory:") else Path(path)


def filesystem_type(path: Path, mounts: str) -> str | None:
    """The type of the filesystem holding ``path``: the mount point above it with the longest path, from the text
    of /proc/self/mounts (device, mount point, type, ...; spaces in a mount point written as \\040)."""
    target = str(path)
    best, kind = "", None
    for line in mounts.splitlines():
        fields = line.split()
        if len(fields) < 3:
            continue
        point = fields[1].replace("\\040", " ")
        inside = target == point or target.startswith(point.rstrip("/") + "/")
        if inside and len(point) >= len(best):
            best, kind = point, fields[2]
    return kind


def start_in_wal_mode(path: Path, mounts: str | None) -> bool:
    """Create the (not yet existing) store file ``path`` in WAL mode where its filesystem is local; True if done.

    ``mounts``: the text of /proc/self/mounts, None where there is none (then nothing is done).
    """
    if path.exists() or mounts is None:
        return False
    folder = path.parent.resolve()
    if filesystem_type(folder, mounts) not in LOCAL_FILESYSTEMS:
        return False
    folder.mkdir(parents=True, exist_ok=True)
    connection = sqlite3.connect(path)
    try:
        mode = connection.execute("PRAGMA journal_mode=WAL").fetchone()[0]
    finally:
        connection.close()
    return mode == "wal"


def local_mounts() -> str | None:
    try:
        return MOUNTS.read_text()
    except OSError:
        return None
