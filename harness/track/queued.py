"""A sweep's MLflow writes, handed to a writer process (``writer.py``) so that they cost the sweep almost nothing.

MLflow's SQL store spends a few milliseconds of Python per call; a sweep makes several calls per run, and
most of a sweep's time is single-threaded UMAP layouts that hold the GIL, so a thread could not overlap them
while a second process can, on a core the layouts leave idle. The writer applies commands in the order they
were sent, so every run, metric and artifact lands exactly as a direct write would have written it, later.

What that changes, and how each is kept right:
- A run's MLflow id exists only once the writer has created it: ``start_run`` returns a reference, every
  later call may name the run by it, and ``run_id`` / ``close`` turn references into ids.
- Every read (``finished_trials``, ``run_table``, ``mark_orphans_killed``, ``run_id``) first waits until the
  writer has applied everything sent before it, so a read sees this process's own writes.
- A store error reaches this process at its next call (or at ``close``) as the same one-line HarnessError,
  after the writer has ended every run it had started as KILLED.
- If this process dies, the writer stops before its next command: nothing is written for work this process
  did not live to finish, and runs left RUNNING carry this process's PID for the next sweep to mark KILLED.
"""

from __future__ import annotations

import atexit
import itertools
import json
import os
import queue
import shutil
import subprocess
import sys
import tempfile
import threading
import uuid
from pathlib import Path
from typing import Any, Iterable, Optional

from harness.errors import HarnessError
from harness.track.writer import REF_PREFIX, SESSION_TAG, running_in_session


class _WriterProcess:
    """One writer process per sweep process, shared by its sweeps one after another (its imports paid once).

    Lines go to it from a sender thread: the caller only queues them, so an interrupt (Ctrl-C) in the caller can
    never leave half a line on the pipe, and a writer slow to read never blocks the sweep."""

    def __init__(self) -> None:
        import harness

        # -P and the package's own folder first: the writer runs this harness, never one found in the working folder.
        source = str(Path(harness.__file__).resolve().parent.parent)
        path = os.pathsep.join([source, *filter(None, [os.environ.get("PYTHONPATH")])])
        self.process = subprocess.Popen([sys.executable, "-P", "-m", "harness.track.writer"], stdin=subprocess.PIPE,
                                        stdout=subprocess.PIPE, env={**os.environ, "PYTHONPATH": path})
        self.replies: dict[str, "queue.Queue[dict]"] = {}
        self.lines: "queue.Queue[Optional[bytes]]" = queue.Queue()
        self.broken = False
        threading.Thread(target=self._route_replies, daemon=True).start()
        threading.Thread(target=self._send_lines, daemon=True).start()

    def _route_replies(self) -> None:
        for line in self.process.stdout:
            try:
                reply = json.loads(line)
            except ValueError:  # not an answer (the writer's answers are its only output there)
                continue
            box = self.replies.get(reply["session"])
            if box is not None:
                box.put(reply)

    def _send_lines(self) -> None:
        while (line := self.lines.get()) is not None:
            try:
                self.process.stdin.write(line)
                self.process.stdin.flush()
            except (OSError, ValueError):  # the writer gone, or its pipe closed by stop() at exit
                self.broken = True
                return

    def alive(self) -> bool:
        return not self.broken and self.process.poll() is None

    def send(self, command: dict) -> None:
        if not self.alive():
            raise BrokenPipeError("the writer process has stopped")
        self.lines.put((json.dumps(command) + "\n").encode())

    def stop(self) -> None:
        """End the writer at this process's exit. A closed session's commands are all applied by then; one never
        closed belongs to a sweep that did not finish, whose writes stop here as if this process had died."""
        self.process.kill()  # first: a sender thread blocked on a full pipe then fails at once, and never hangs here
        self.process.wait()
        self.lines.put(None)
        try:
            self.process.stdin.close()
        except (OSError, ValueError):
            pass


_writer: Optional[_WriterProcess] = None
_writer_lock = threading.Lock()


def writer_process() -> _WriterProcess:
    """The running writer process, started now if there is none (its start overlaps what the caller does next)."""
    global _writer
    with _writer_lock:
        if _writer is None or not _writer.alive():
            _writer = _WriterProcess()
            atexit.register(_writer.stop)
        return _writer


def sqlite_store_path(tracking_uri: str) -> Optional[Path]:
    """The file of a ``sqlite:///`` store (None for an in-memory or non-SQLite store)."""
    if not tracking_uri.startswith("sqlite:///"):
        return None
    location = tracking_uri[len("sqlite:///"):].split("?", 1)[0]
    return Path(location) if location and location != ":memory:" else None


def _absolute_uri(tracking_uri: str) -> str:
    """A ``sqlite:///`` store's URI with its file's absolute path; any other URI as it is."""
    path = sqlite_store_path(tracking_uri)
    if path is None or path.is_absolute():
        return tracking_uri
    query = tracking_uri.partition("?")[2]
    return f"sqlite:///{path.resolve()}" + (f"?{query}" if query else "")


def store_reader(tracking_uri: str, artifact_root: Path, experiment_name: str):
    """The store opened for reading in this process, or None where it is a SQLite file that does not exist yet: a
    store not yet created holds no run to reuse and no orphan to mark (and opening it would create it here)."""
    from harness.track.tracking import SweepTracker

    path = sqlite_store_path(tracking_uri)
    if path is not None and not path.exists():
        return None
    return SweepTracker(tracking_uri, artifact_root, experiment_name)


class QueuedTracker:
    """SweepTracker's writing methods, applied by the writer process in order; its reading methods after a flush."""

    def __init__(self, tracking_uri: str, artifact_root: Path, experiment_name: str, reader=None):
        self.tracking_uri = tracking_uri
        self._artifact_root, self._experiment_name = artifact_root, experiment_name
        self._reader = reader
        self._session = uuid.uuid4().hex
        self._refs = itertools.count()
        self._tokens = itertools.count()
        self._ids: dict[str, str] = {}
        self._error: Optional[str] = None
        self._closed = False
        self._staging = Path(tempfile.mkdtemp(prefix="harness-log-"))
        self._writer = writer_process()
        self._replies: "queue.Queue[dict]" = queue.Queue()
        self._writer.replies[self._session] = self._replies
        # Paths resolved and the environment sent here: the writer was started in another folder and environment
        # (by an earlier sweep of this process), and MLflow reads both (relative store paths, credentials).
        self._send("open", uri=tracking_uri, open_uri=_absolute_uri(tracking_uri),
                   artifact_root=str(Path(artifact_root).resolve()), experiment=experiment_name,
                   owner_pid=os.getpid(), environ=dict(os.environ), staging=str(self._staging))

    # -- sending -------------------------------------------------------------------------------------------
    def _send(self, op: str, **fields: Any) -> None:
        if self._closed:
            raise HarnessError(f"tracking store {self.tracking_uri}: written after the sweep's log was closed")
        try:
            self._writer.send({"session": self._session, "op": op, **fields})
        except OSError:
            self._fail(self._writer_stopped())
        self._raise_reported()

    def _writer_stopped(self) -> str:
        return f"tracking store {self.tracking_uri}: the writer process stopped (exit status {self._writer.process.poll()})"

    def _fail(self, message: str) -> None:
        self._error = self._error or message
        raise HarnessError(self._error)

    def _raise_reported(self) -> None:
        """Raise the writer's error as soon as one has come back (at the first call after it)."""
        while True:
            try:
                reply = self._replies.get_nowait()
            except queue.Empty:
                break
            self._take(reply)
        if self._error is not None:
            raise HarnessError(self._error)

    def _take(self, reply: dict) -> None:
        self._ids.update(reply.get("ids") or {})
        if reply.get("error") and self._error is None:
            self._error = reply["error"]

    def _wait(self, op: str) -> None:
        """Send ``op`` (flush or close) and wait until the writer has applied everything sent before it."""
        token = next(self._tokens)
        try:
            self._writer.send({"session": self._session, "op": op, "token": token})
        except OSError:
            self._error = self._error or self._writer_stopped()
            return
        while True:
            try:
                reply = self._replies.get(timeout=1.0)
            except queue.Empty:
                if not self._writer.alive():
                    self._error = self._error or self._writer_stopped()
                    return
                continue
            self._take(reply)
            if reply["kind"] == op and reply.get("token") == token:
                return

    def _staged(self) -> Path:
        folder = self._staging / str(next(self._refs))
        folder.mkdir()
        return folder

    # -- writing (SweepTracker's signatures) ------------------------------------------------------------------
    def start_run(self, name: str, parent_id: Optional[str], kind: str, params: dict[str, Any], tags: dict[str, str],
                  trial_key: Optional[str] = None) -> str:
        ref = f"{REF_PREFIX}{self._session[:12]}-{next(self._refs)}"
        self._send("start_run", ref=ref, name=name, parent=parent_id, kind=kind,
                   params={k: str(v) for k, v in params.items()},
                   tags={**{k: str(v) for k, v in tags.items()}, SESSION_TAG: self._session}, trial_key=trial_key)
        return ref

    def log_results(self, run_id: str, metrics: dict[str, float], tags: Optional[dict[str, str]] = None) -> None:
        self._send("log", run=run_id, metrics={k: float(v) for k, v in metrics.items() if v is not None},
                   tags={k: str(v) for k, v in (tags or {}).items()})

    def log_files(self, run_id: str, files: Iterable[Path], artifact_path: Optional[str] = None) -> None:
        folder = self._staged()
        for path in files:
            shutil.copyfile(path, folder / Path(path).name)
        self._send("files", run=run_id, folder=str(folder), artifact_path=artifact_path)

    def log_folder(self, run_id: str, folder: Path) -> None:
        staged = self._staged()
        for path in Path(folder).iterdir():
            shutil.copyfile(path, staged / path.name)
        self._send("files", run=run_id, folder=str(staged), artifact_path=None)

    def log_text(self, run_id: str, text: str, file_name: str) -> None:
        folder = self._staged()
        (folder / file_name).write_text(text)
        self._send("files", run=run_id, folder=str(folder), artifact_path=None)

    def log_dataset(self, run_id: str, name: str, digest: str, source_type: str, source: str, profile: dict) -> None:
        self._send("dataset", run=run_id, name=name, digest=digest, source_type=source_type, source=source,
                   profile=profile)

    def show_ranking(self, sweep_run_id: str, rank_metrics: Iterable[str]) -> None:
        self._send("ranking", run=sweep_run_id, metrics=list(rank_metrics))

    def end(self, run_id: str, status: str, error: Optional[str] = None) -> None:
        """Never raises: it is called while cleaning up after another error, which must not be replaced."""
        try:
            self._send("end", run=run_id, status=status, error=error)
        except HarnessError:
            pass

    # -- reading --------------------------------------------------------------------------------------------
    def flush(self) -> None:
        """Wait until the writer has applied every command sent so far; raise its error if it had one."""
        self._wait("flush")
        self._raise_reported()

    def run_id(self, ref: str) -> str:
        """The MLflow id of a run started here (waits for the writer), or ``ref`` itself where it is already one."""
        if not ref.startswith(REF_PREFIX):
            return ref
        if ref not in self._ids:
            self.flush()
        return self._ids[ref]

    def _store(self):
        self.flush()
        if self._reader is None:
            from harness.track.tracking import SweepTracker

            self._reader = SweepTracker(self.tracking_uri, self._artifact_root, self._experiment_name)
        return self._reader

    def finished_trials(self) -> dict[str, Any]:
        return self._store().finished_trials()

    def run_table(self, run_id: str, name: str):
        return self._store().run_table(self.run_id(run_id), name)

    def mark_orphans_killed(self) -> int:
        return self._store().mark_orphans_killed()

    # -- the end ----------------------------------------------------------------------------------------------
    def close(self) -> dict[str, str]:
        """Wait for the writer to apply everything, then return every reference's run id. Never raises: the
        error, if any, is in ``error`` (the caller raises it where no other error is on its way)."""
        if not self._closed:
            self._wait("close")
            self._closed = True
            self._writer.replies.pop(self._session, None)
            shutil.rmtree(self._staging, ignore_errors=True)
            if not self._writer.alive():
                self._end_left_running()
        return dict(self._ids)

    def _end_left_running(self) -> None:
        """The writer died with this process alive: its runs would stay RUNNING (their owner lives), so end them
        KILLED from here, found by this session's tag."""
        try:
            reader = self._reader
            if reader is None:
                from harness.track.tracking import SweepTracker

                reader = SweepTracker(self.tracking_uri, self._artifact_root, self._experiment_name)
            for run in reader._runs(running_in_session(self._session)):
                reader.client.set_terminated(run.info.run_id, status="KILLED")
        except Exception:  # the store itself may be what is broken: the error already says so
            pass

    @property
    def error(self) -> Optional[str]:
        return self._error

    def resolved(self, ref: Optional[str]) -> Optional[str]:
        """After ``close``: the run id of a reference (an id, or None, as it is)."""
        if ref is None or not ref.startswith(REF_PREFIX):
            return ref
        return self._ids.get(ref)
