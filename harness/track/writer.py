"""The process that writes a sweep's runs to MLflow while the sweep's own process computes (``queued.py``).

It reads one JSON command per line on stdin and answers on stdout, one JSON line per flush, close or
error. Commands belong to sessions (one per sweep); runs are named by references the sweep's process chose,
and a reference becomes an MLflow run id when its run is created here. When stdin ends without the session
being closed, the sweep's process is gone: this process stops at once, before the next command, as it would
have died with it, and runs it had started stay RUNNING for the next sweep to mark KILLED (their owner PID is
the sweep's process's).
"""

from __future__ import annotations

import json
import os
import queue
import shutil
import signal
import sys
import threading
from pathlib import Path
from typing import Any, Optional, TextIO

REF_PREFIX = "pending-"  # a run reference, never an MLflow run id (32 hexadecimal digits)
SESSION_TAG = "harness.log_session"  # on every run a writer session makes: how its runs are found if the writer dies


def running_in_session(session: str) -> str:
    """The MLflow search filter for a writer session's runs still RUNNING (tagged with SESSION_TAG)."""
    return f"attributes.status = 'RUNNING' and tags.`{SESSION_TAG}` = '{session}'"


class _Session:
    """One sweep's store, its runs by reference, and the first error, after which its commands are dropped."""

    def __init__(self, command: dict):
        self.command = command
        self.tracker = None
        self.ids: dict[str, str] = {}
        self.open_runs: dict[str, str] = {}  # started here, not yet ended
        self.error: Optional[str] = None

    def run_id(self, ref: Optional[str]) -> Optional[str]:
        if ref is None or not ref.startswith(REF_PREFIX):
            return ref
        if ref in self.ids:
            return self.ids[ref]
        raise KeyError(f"no run was started for reference {ref!r}")

    def open(self) -> None:
        from harness.track.tracking import SweepTracker

        opened = self.command
        os.environ.clear()
        os.environ.update(opened["environ"])
        self.tracker = SweepTracker(opened["open_uri"], Path(opened["artifact_root"]), opened["experiment"],
                                    owner_pid=opened["owner_pid"])

    def apply(self, command: dict) -> None:
        op = command["op"]
        tracker = self.tracker
        if op == "start_run":
            run_id = tracker.start_run(command["name"], self.run_id(command["parent"]), command["kind"],
                                       command["params"], command["tags"], trial_key=command["trial_key"])
            self.ids[command["ref"]] = run_id
            self.open_runs[command["ref"]] = run_id
        elif op == "log":
            tracker.log_results(self.run_id(command["run"]), command["metrics"], tags=command["tags"] or None)
        elif op == "files":
            folder = Path(command["folder"])
            try:
                tracker.log_folder_as(self.run_id(command["run"]), folder, command["artifact_path"])
            finally:
                shutil.rmtree(folder, ignore_errors=True)
        elif op == "dataset":
            tracker.log_dataset(self.run_id(command["run"]), command["name"], command["digest"], command["source_type"],
                                command["source"], command["profile"])
        elif op == "ranking":
            tracker.show_ranking(self.run_id(command["run"]), command["metrics"])
        elif op == "end":
            tracker.end(self.run_id(command["run"]), command["status"], error=command["error"])
            self.open_runs.pop(command["run"], None)
        else:
            raise ValueError(f"unknown command {op!r}")

    def fail(self, err: BaseException) -> None:
        """Remember the first error and end every run still open as KILLED, so that none is left RUNNING."""
        from harness.errors import HarnessError

        lines = str(err).strip().splitlines()
        if isinstance(err, HarnessError):
            self.error = lines[0]
        else:
            said = f"{type(err).__name__}: {lines[0]}" if lines else type(err).__name__
            self.error = f"tracking store {self.command['uri']}: {said}"
        if self.tracker is None:
            return
        try:
            # Also a run whose creation went through and whose params then failed (not yet in open_runs).
            found = {r.info.run_id for r in self.tracker._runs(running_in_session(self.command["session"]))}
        except Exception:  # the store itself may be what failed: the next sweep marks these orphans
            found = set()
        for run_id in set(self.open_runs.values()) | found:
            try:
                self.tracker.end(run_id, "KILLED")
            except Exception:
                pass
        self.open_runs.clear()


def _answer(out: TextIO, **reply: Any) -> None:
    out.write(json.dumps(reply) + "\n")
    out.flush()


def serve(commands: "queue.Queue[Optional[bytes]]", gone: threading.Event, out: TextIO) -> None:
    """Apply commands in order until the sweep's process is gone (``gone``) or the queue ends (None)."""
    sessions: dict[str, _Session] = {}
    while True:
        line = commands.get()
        if line is None or gone.is_set():
            for session in sessions.values():  # the copies of artifacts it will never log
                if session.command.get("staging"):
                    shutil.rmtree(session.command["staging"], ignore_errors=True)
            return
        try:
            command = json.loads(line)
            name, op = command["session"], command["op"]
        except (ValueError, KeyError, TypeError) as err:
            # Not a whole command (the sweep's process was interrupted while sending): whose it was is unknown,
            # so every open session ends here, its runs KILLED, rather than go on with a write missing.
            for name, session in sessions.items():
                if session.error is None:
                    session.fail(ValueError(f"a command could not be read ({err})"))
                    _answer(out, session=name, kind="error", error=session.error)
            continue
        if op == "open":
            session = sessions[name] = _Session(command)
            try:
                session.open()
            except Exception as err:  # noqa: BLE001 - a store that cannot be opened is this session's error
                session.fail(err)
                _answer(out, session=name, kind="error", error=session.error)
            continue
        session = sessions[name]
        if op in ("flush", "close"):
            _answer(out, session=name, kind=op, token=command.get("token"), ids=session.ids, error=session.error)
            if op == "close":
                del sessions[name]
            continue
        if session.error is not None:
            continue
        try:
            session.apply(command)
        except Exception as err:  # noqa: BLE001 - any failure of the store ends the session, reported once
            session.fail(err)
            _answer(out, session=name, kind="error", error=session.error)


def _read_lines(stream, commands: "queue.Queue[Optional[bytes]]", gone: threading.Event) -> None:
    """Read commands as fast as they come, so that the sweep's process never waits on a full pipe."""
    for line in stream:
        commands.put(line)
    gone.set()  # end of input without a close: the sweep's process has died
    commands.put(None)


def _yield_to_the_sweep() -> None:
    """The lowest priority (nice 19): the writer is to run on what the sweep leaves idle (a core beside a
    single-threaded UMAP layout), not to take a core from a multi-threaded stage, whose threads (k-means' OpenMP
    team) all wait for the slowest. Not Linux's idle class: a process cannot leave it unprivileged, and on a
    machine busy with other jobs it would get almost no CPU while the sweep waits for it; nice 19 gets a small
    share there. (The demo's 16 clusterings next to a busy loop, twice each, one process: alone 0.50 / 0.77 s,
    idle class 0.66 / 0.44 s, nice 19 0.89 / 0.66 s, nice 0 1.94 / 0.96 s.)"""
    if hasattr(os, "nice"):
        os.nice(19)


def main() -> None:
    # Ctrl-C reaches the whole process group: the sweep's process handles it and sends its runs' last status.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _yield_to_the_sweep()
    out = os.fdopen(os.dup(sys.stdout.fileno()), "w")
    os.dup2(sys.stderr.fileno(), sys.stdout.fileno())  # nothing a library prints, from Python or C, mixes with answers
    sys.stdout = sys.stderr
    commands: "queue.Queue[Optional[bytes]]" = queue.Queue()
    gone = threading.Event()
    threading.Thread(target=_read_lines, args=(sys.stdin.buffer, commands, gone), daemon=True).start()
    import mlflow.tracking  # noqa: F401 - this process exists to write to MLflow: import it while commands queue up

    serve(commands, gone, out)


if __name__ == "__main__":
    main()
