"""A new local SQLite store starts in WAL mode; a store on a network filesystem, or one that exists, is left alone."""

from __future__ import annotations

import sqlite3
from pathlib import Path

import pytest

from harness.track.sqlite_store import (
    LOCAL_FILESYSTEMS,
    filesystem_type,
    local_mounts,
    sqlite_path,
    start_in_wal_mode,
)
from harness.track.tracking import SweepTracker, default_tracking_uri

MOUNTS = """\
/dev/vda / ext4 rw,relatime 0 0
proc /proc proc rw,nosuid 0 0
server:/export /work nfs4 rw,vers=4.2 0 0
/dev/vdb /work/local xfs rw 0 0
tmpfs /work/local/ram tmpfs rw 0 0
//host/share /mnt/my\\040share cifs rw 0 0
"""


@pytest.mark.parametrize("path, expected", [
    ("/", "ext4"), ("/home/user/results", "ext4"),
    ("/work", "nfs4"), ("/work/results", "nfs4"),
    ("/workspace/results", "ext4"),  # a name that starts like a mount point is not under it
    ("/work/local", "xfs"), ("/work/local/results", "xfs"), ("/work/local/ram/x", "tmpfs"),
    ("/mnt/my share/results", "cifs"), ("/mnt/my", "ext4"),
])
def test_filesystem_type_is_the_longest_mount_point_above_the_path(path, expected):
    assert filesystem_type(Path(path), MOUNTS) == expected


def _mounts_with(folder: Path, kind: str) -> str:
    return f"/dev/vda / ext4 rw 0 0\nsomewhere {folder} {kind} rw 0 0\n"


NETWORK_OR_UNKNOWN = ("nfs", "nfs4", "cifs", "smb3", "smbfs", "fuse.sshfs", "9p", "ceph", "glusterfs", "lustre",
                      "fuse.gcsfuse", "fuse.s3fs", "virtiofs", "afs", "made_up_fs")


@pytest.mark.parametrize("kind", sorted(LOCAL_FILESYSTEMS) + list(NETWORK_OR_UNKNOWN))
def test_a_new_store_is_in_wal_mode_only_on_a_local_filesystem(tmp_path, kind):
    # SQLite's documentation (sqlite.org/wal.html, "WAL does not work over a network filesystem"): every type not
    # on the local list, known network filesystems and unknown names alike, keeps SQLite's default journal.
    store = tmp_path / "results" / "mlflow.db"
    done = start_in_wal_mode(store, _mounts_with(tmp_path, kind))
    assert done == (kind in LOCAL_FILESYSTEMS)
    assert store.exists() == done  # nothing is created where nothing is changed
    if done:
        assert sqlite3.connect(store).execute("PRAGMA journal_mode").fetchone()[0] == "wal"


def test_an_existing_store_keeps_its_mode_and_no_mounts_changes_nothing(tmp_path):
    store = tmp_path / "mlflow.db"
    sqlite3.connect(store).execute("CREATE TABLE t (x)").connection.commit()
    assert not start_in_wal_mode(store, _mounts_with(tmp_path, "ext4"))
    assert sqlite3.connect(store).execute("PRAGMA journal_mode").fetchone()[0] == "delete"
    assert not start_in_wal_mode(tmp_path / "other.db", None)
    assert not (tmp_path / "other.db").exists()


@pytest.mark.parametrize("uri, expected", [
    ("sqlite:////abs/results/mlflow.db", Path("/abs/results/mlflow.db")),
    ("sqlite:///relative/mlflow.db", Path("relative/mlflow.db")),
    ("sqlite:///mlflow.db?timeout=20", Path("mlflow.db")),
    ("sqlite:///:memory:", None), ("sqlite://", None),
    ("http://127.0.0.1:5000", None), ("postgresql://u@h/db", None), ("file:///tmp/mlruns", None),
])
def test_sqlite_path_reads_the_uri_as_sqlalchemy_does(uri, expected):
    assert sqlite_path(uri) == expected


def test_the_default_store_of_a_sweep_is_in_wal_mode_where_the_disk_is_local(tmp_path):
    # The tracker creates the store; its runs are then readable by another connection (the MLflow UI's case).
    mounts = local_mounts()
    local = mounts is not None and filesystem_type(tmp_path.resolve(), mounts) in LOCAL_FILESYSTEMS
    tracker = SweepTracker(default_tracking_uri(tmp_path), tmp_path / "artifacts", "wal_check")
    run = tracker.start_run("a run", None, "sweep", {"p": 1}, {})
    tracker.log_results(run, {"ari": 0.5})
    tracker.end(run, "FINISHED")
    reader = sqlite3.connect(tmp_path / "mlflow.db")
    assert reader.execute("PRAGMA journal_mode").fetchone()[0] == ("wal" if local else "delete")
    assert reader.execute("SELECT value FROM latest_metrics WHERE run_uuid = ? AND key = 'ari'", (run,)).fetchone() == (0.5,)
    assert reader.execute("SELECT status FROM runs WHERE run_uuid = ?", (run,)).fetchone() == ("FINISHED",)
