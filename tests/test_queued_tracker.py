"""The writer process: a sweep's MLflow writes, applied later by another process, land exactly as direct writes do.

The rule the queued tracker rests on is "a queued write equals the direct write": checked here for every writing
method and the variants of its arguments, by writing the same sequence once through SweepTracker (in this
process) and once through QueuedTracker, and comparing the two stores run by run, through MLflow's own client.
The other rules: a read sees every write sent before it; a store error arrives as one line and leaves no run
RUNNING; when the sweep's process dies the writer stops before its next command; and a sweep's results name
MLflow ids, never references.
"""

from __future__ import annotations

import json
import math
import os
import queue
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from harness.errors import HarnessError
from harness.track.queued import QueuedTracker, sqlite_store_path, store_reader
from harness.track.runs_view import RANKING_VIEW_TAG
from harness.track.tracking import PARENT_TAG, PID_TAG, SweepTracker, default_tracking_uri
from harness.track.writer import REF_PREFIX, SESSION_TAG, serve

from conftest import write_sweep

LONG = "x" * 6000  # over MLflow's tag length: both paths cut it at the same place


def _files(folder: Path) -> dict[str, Path]:
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "a.txt").write_text("first file\n")
    (folder / "b.json").write_text(json.dumps({"k": [1, 2, 3]}))
    pd.DataFrame({"id": ["t1", "t2"], "cluster": [0, -1]}).to_parquet(folder / "c.parquet", index=False)
    return {p.name: p for p in folder.iterdir()}


def _write_sequence(tracker, scratch: Path) -> None:
    """Every writing method, with each variant of its arguments that takes a different path through it."""
    files = _files(scratch / "files")
    sweep = tracker.start_run("sweep", None, "sweep", {"n_trials": 3, "rank_by": None, "grid.x": [1, 2]},
                              {"harness.question": "which?", "long": LONG})
    tracker.show_ranking(sweep, ["ari", "silhouette"])
    config = tracker.start_run("config", sweep, "configuration", {"pooling": "mean", "k": 8}, {"harness.config_key": "c1"})
    tracker.log_text(config, json.dumps({"datasets": []}), "configuration.json")
    seeds = []
    for seed in range(3):
        run = tracker.start_run(f"seed {seed}", config, "trial", {"seed": seed, "pooling": "mean"},
                                {"harness.config_key": "c1"}, trial_key=f"key{seed}")
        tracker.log_dataset(run, "demo", "abc123", "synthetic", "synthetic", {"rows": 10, "classes": 2})
        seeds.append(run)
    tracker.log_folder(seeds[0], scratch / "files")
    tracker.log_results(seeds[0], {"ari": 0.5, "nmi": np.float32(0.25), "n": np.int64(7), "flag": True, "nan": float("nan"),
                                   "inf": float("inf"), "skipped": None}, tags={"note": "a", "long": LONG})
    tracker.log_results(seeds[1], {"ari": 0.1})  # metrics alone
    tracker.log_results(seeds[1], {}, tags={"only": "tags"})  # tags alone
    tracker.log_results(seeds[1], {})  # nothing
    tracker.log_files(seeds[1], [files["a.txt"], files["b.json"]])
    tracker.log_files(seeds[2], [files["c.parquet"]], "sub/dir")
    tracker.end(seeds[0], "FINISHED")
    tracker.end(seeds[1], "FAILED", error="ValueError: bad")
    tracker.end(seeds[2], "KILLED")
    tracker.log_results(config, {"ari_mean": 0.3}, tags={"harness.winner": "yes"})
    tracker.end(config, "FINISHED")
    tracker.log_results(sweep, {"n_finished": 1})
    tracker.end(sweep, "FINISHED")


def _store_contents(uri: str, experiment: str) -> dict:
    """Everything a reader can see of an experiment, with run ids replaced by run names."""
    from mlflow.tracking import MlflowClient

    client = MlflowClient(tracking_uri=uri)
    found = client.get_experiment_by_name(experiment)
    runs = client.search_runs([found.experiment_id], max_results=100)
    names = {r.info.run_id: r.info.run_name for r in runs}

    def named(text: str) -> str:
        for run_id, name in names.items():
            text = text.replace(run_id, f"<{name}>")
        return text

    contents = {"experiment_tags": {k: named(v) for k, v in found.tags.items()}}
    for run in runs:
        tags = dict(run.data.tags)
        if PARENT_TAG in tags:
            tags[PARENT_TAG] = names[tags[PARENT_TAG]]
        artifacts = {}
        pending = [None]
        while pending:
            for item in client.list_artifacts(run.info.run_id, pending.pop()):
                if item.is_dir:
                    pending.append(item.path)
                else:
                    local = client.download_artifacts(run.info.run_id, item.path)
                    artifacts[item.path] = Path(local).read_bytes()
        inputs = [(d.dataset.name, d.dataset.digest, d.dataset.source_type, d.dataset.source, d.dataset.profile,
                   sorted((t.key, t.value) for t in d.tags)) for d in run.inputs.dataset_inputs]
        contents[run.info.run_name] = {
            "status": run.info.status, "params": dict(run.data.params), "tags": tags, "inputs": inputs,
            "metrics": {k: ("nan" if math.isnan(v) else v) for k, v in run.data.metrics.items()},
            "artifacts": artifacts,
        }
    return contents


def test_every_queued_write_lands_as_the_direct_write(tmp_path):
    direct_uri, queued_uri = default_tracking_uri(tmp_path / "direct"), default_tracking_uri(tmp_path / "queued")
    (tmp_path / "direct").mkdir()
    (tmp_path / "queued").mkdir()
    _write_sequence(SweepTracker(direct_uri, tmp_path / "direct" / "artifacts", "same"), tmp_path / "d")
    queued = QueuedTracker(queued_uri, tmp_path / "queued" / "artifacts", "same")
    _write_sequence(queued, tmp_path / "q")
    ids = queued.close()
    assert queued.error is None
    assert len(ids) == 5 and all(len(i) == 32 for i in ids.values())

    direct, written = _store_contents(direct_uri, "same"), _store_contents(queued_uri, "same")
    # The one addition: the writer session's tag, by which the runs are found if the writer dies.
    sessions = {run["tags"].pop(SESSION_TAG) for name, run in written.items() if name != "experiment_tags"}
    assert len(sessions) == 1
    assert set(direct) == set(written)
    for name in direct:
        assert written[name] == direct[name], name
    # The sequence reaches every path: a comparison of empty stores would also be equal.
    assert direct["seed 0"]["metrics"]["nmi"] == 0.25 and direct["seed 0"]["metrics"]["nan"] == "nan"
    assert "skipped" not in direct["seed 0"]["metrics"] and len(direct["seed 0"]["tags"]["long"]) == 5000
    assert set(direct["seed 0"]["artifacts"]) == {"a.txt", "b.json", "c.parquet"}
    assert set(direct["seed 2"]["artifacts"]) == {"sub/dir/c.parquet"}
    assert direct["seed 1"]["tags"]["harness.error"] == "ValueError: bad" and direct["seed 1"]["status"] == "FAILED"
    assert direct["seed 0"]["inputs"] and direct["config"]["artifacts"]["configuration.json"]
    assert "<sweep>" in direct["experiment_tags"][RANKING_VIEW_TAG]  # the view names the sweep run, by its own id
    # The owner of every run is this process, not the writer: orphans are found by it.
    assert {r["tags"][PID_TAG] for k, r in written.items() if k != "experiment_tags"} == {str(os.getpid())}


def test_a_read_sees_every_write_sent_before_it(tmp_path):
    uri = default_tracking_uri(tmp_path)
    tracker = QueuedTracker(uri, tmp_path / "artifacts", "reads")
    parent = tracker.start_run("sweep", None, "sweep", {}, {})
    assert parent.startswith(REF_PREFIX)
    trial = tracker.start_run("seed", parent, "trial", {}, {}, trial_key="k1")
    folder = tmp_path / "table"
    folder.mkdir()
    pd.DataFrame({"id": ["a", "b"], "cluster": [3, 4]}).to_parquet(folder / "assignments.parquet", index=False)
    tracker.log_folder(trial, folder)
    tracker.end(trial, "FINISHED")
    # finished_trials: the trial just ended is there
    finished = tracker.finished_trials()
    assert list(finished) == ["k1"]
    # run_id: the reference's id is the run the store holds
    assert finished["k1"].info.run_id == tracker.run_id(trial)
    # run_table: by reference or by id, the table just logged
    for name in (trial, tracker.run_id(trial)):
        assert tracker.run_table(name, "assignments.parquet")["cluster"].tolist() == [3, 4]
    # mark_orphans_killed: runs owned by this live process are not orphans
    assert tracker.mark_orphans_killed() == 0
    tracker.end(parent, "FINISHED")
    ids = tracker.close()
    assert tracker.resolved(parent) == ids[parent] and tracker.resolved("0" * 32) == "0" * 32 and tracker.resolved(None) is None


def test_a_run_made_just_before_the_store_failed_is_killed_too(tmp_path):
    """start_run creates the run, then logs its params: when the params fail, the run exists without the writer
    having its id; it must still end KILLED (found by its session's tag), not stay RUNNING with a live owner."""
    from mlflow.tracking import MlflowClient

    uri = default_tracking_uri(tmp_path)
    tracker = QueuedTracker(uri, tmp_path / "artifacts", "half made")
    parent = tracker.start_run("sweep", None, "sweep", {}, {})
    tracker.start_run("seed", parent, "trial", {"p" * 300: 1}, {})  # MLflow refuses a param key over 250 characters
    with pytest.raises(HarnessError, match="tracking store"):
        tracker.flush()
    tracker.close()
    client = MlflowClient(tracking_uri=uri)
    runs = client.search_runs([client.get_experiment_by_name("half made").experiment_id])
    assert {r.info.run_name: r.info.status for r in runs} == {"sweep": "KILLED", "seed": "KILLED"}


def test_a_store_error_arrives_as_one_line_and_leaves_no_run_running(tmp_path):
    from mlflow.tracking import MlflowClient

    uri = default_tracking_uri(tmp_path)
    tracker = QueuedTracker(uri, tmp_path / "artifacts", "broken")
    parent = tracker.start_run("sweep", None, "sweep", {}, {})
    child = tracker.start_run("seed", parent, "trial", {}, {})
    tracker.log_results(child, {"../not a metric name": 1.0})  # MLflow refuses the name: the store's error
    with pytest.raises(HarnessError) as caught:
        tracker.flush()
    message = str(caught.value)
    assert message.startswith(f"tracking store {uri}: ") and len(message.splitlines()) == 1
    with pytest.raises(HarnessError, match="tracking store"):  # every later write says it too
        tracker.log_results(parent, {"ari": 1.0})
    tracker.end(parent, "FINISHED")  # ending never raises (it runs while another error is on its way)
    tracker.close()
    assert tracker.error == message
    client = MlflowClient(tracking_uri=uri)
    runs = client.search_runs([client.get_experiment_by_name("broken").experiment_id])
    assert sorted(r.info.status for r in runs) == ["KILLED", "KILLED"]


def test_a_store_that_cannot_be_opened_is_one_line(tmp_path):
    blocker = tmp_path / "file"
    blocker.write_text("not a folder")
    uri = f"sqlite:///{blocker / 'mlflow.db'}"
    tracker = QueuedTracker(uri, tmp_path / "artifacts", "nowhere")
    with pytest.raises(HarnessError) as caught:
        tracker.flush()
    assert str(caught.value).startswith(f"tracking store {uri}: ") and len(str(caught.value).splitlines()) == 1
    tracker.close()


class _GoneAfter(queue.Queue):
    """A command queue whose process dies (``gone`` set) after ``n`` commands have been taken from it."""

    def __init__(self, lines, gone: threading.Event, n: int):
        super().__init__()
        for line in lines:
            self.put(line)
        self.gone, self.n, self.taken = gone, n, 0

    def get(self, *args, **kwargs):
        if self.taken == self.n:
            self.gone.set()
        self.taken += 1
        return super().get(*args, **kwargs)


@pytest.mark.parametrize("dies_after", range(0, 7))
def test_the_writer_applies_nothing_after_the_sweep_process_is_gone(tmp_path, dies_after, monkeypatch):
    import io

    from harness.track import writer

    applied = []
    monkeypatch.setattr(writer._Session, "open", lambda self: applied.append("open"))
    monkeypatch.setattr(writer._Session, "apply", lambda self, command: applied.append(command["op"]))
    ops = ["open", "start_run", "log", "files", "end", "ranking"]
    lines = [json.dumps({"session": "s", "op": op}).encode() for op in ops] + [None]
    gone = threading.Event()
    serve(_GoneAfter(lines, gone, dies_after), gone, io.StringIO())
    assert applied == ops[:min(dies_after, len(ops))]


def _wait_gone(pid: int) -> bool:
    """Whether the process ends (or is a zombie) within a minute: a bound on a wait, not a timing assertion."""
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        try:
            if "zombie" in Path(f"/proc/{pid}/status").read_text():
                return True
        except FileNotFoundError:
            return True
        time.sleep(0.1)
    return False


def test_the_writer_stops_when_the_sweep_process_is_killed(tmp_path):
    """The sweep process queues 300 writes while its writer is paused (as a starved writer is), then dies. Resumed,
    the writer reads them all (they are in the pipe) and must apply none: it stops with the sweep. Its run stays
    RUNNING, with the dead process's PID, for the next sweep to mark KILLED."""
    import signal

    script = f"""
import os, signal
from pathlib import Path
from harness.track.queued import QueuedTracker, writer_process
tracker = QueuedTracker({default_tracking_uri(tmp_path)!r}, Path({str(tmp_path / 'artifacts')!r}), "killed")
run = tracker.start_run("sweep", None, "sweep", {{}}, {{}})
tracker.flush()
writer = writer_process()
print(writer.process.pid, flush=True)
os.kill(writer.process.pid, signal.SIGSTOP)
for i in range(300):
    tracker.log_results(run, {{f"m{{i}}": float(i)}})
while not writer.lines.empty():  # every line handed to the pipe
    pass
os.kill(os.getpid(), signal.SIGKILL)
"""
    sweep = subprocess.Popen([sys.executable, "-c", script], stdout=subprocess.PIPE, text=True)
    writer_pid = int(sweep.stdout.readline())
    try:
        assert sweep.wait(timeout=120) == -9
    finally:  # whatever happened, neither is left behind (a stopped writer, a spinning sweep)
        sweep.kill()
        os.kill(writer_pid, signal.SIGCONT)
    assert _wait_gone(writer_pid)
    from mlflow.tracking import MlflowClient

    client = MlflowClient(tracking_uri=default_tracking_uri(tmp_path))
    (run,) = client.search_runs([client.get_experiment_by_name("killed").experiment_id])
    assert run.info.status == "RUNNING" and len(run.data.metrics) <= 2  # the 300 were not applied (one may have been)
    reader = SweepTracker(default_tracking_uri(tmp_path), tmp_path / "artifacts", "killed")
    assert reader.mark_orphans_killed() == 1


def test_a_writer_that_dies_leaves_no_run_running_in_a_living_process(tmp_path):
    """The writer is killed while this process lives on (a notebook): the error is one line, and the runs it had made
    are ended KILLED from here (no later start would: their owner is alive)."""
    import signal

    from mlflow.tracking import MlflowClient

    from harness.track import queued

    uri = default_tracking_uri(tmp_path)
    other = QueuedTracker(uri, tmp_path / "artifacts", "lost")  # another sweep's run, still going: not this one's
    other.start_run("another sweep", None, "sweep", {}, {})
    other.flush()
    tracker = QueuedTracker(uri, tmp_path / "artifacts", "lost")
    parent = tracker.start_run("sweep", None, "sweep", {}, {})
    tracker.start_run("seed", parent, "trial", {}, {})
    tracker.flush()
    writer = queued.writer_process()
    os.kill(writer.process.pid, signal.SIGKILL)
    writer.process.wait()
    with pytest.raises(HarnessError, match=r"^tracking store .*: the writer process stopped \(exit status -9\)$"):
        tracker.log_results(parent, {"ari": 1.0})
    tracker.close()
    client = MlflowClient(tracking_uri=uri)
    runs = client.search_runs([client.get_experiment_by_name("lost").experiment_id])
    assert {r.info.run_name: r.info.status for r in runs} == {"sweep": "KILLED", "seed": "KILLED", "another sweep": "RUNNING"}
    assert queued.writer_process().alive()  # the next sweep gets a new writer


def test_half_a_command_ends_every_open_session_with_its_runs_killed(tmp_path):
    """A line cut short (the sweep's process interrupted while sending) cannot be said to belong to a session:
    every open session fails, its runs KILLED, and each is told."""
    import io

    from mlflow.tracking import MlflowClient

    uri = default_tracking_uri(tmp_path)
    common = {"uri": uri, "open_uri": uri, "artifact_root": str(tmp_path / "artifacts"), "owner_pid": os.getpid(),
              "environ": dict(os.environ)}
    lines = [json.dumps({"session": "a", "op": "open", "experiment": "a", **common}),
             json.dumps({"session": "b", "op": "open", "experiment": "b", **common}),
             json.dumps({"session": "a", "op": "start_run", "ref": "pending-a-0", "name": "r", "parent": None,
                         "kind": "sweep", "params": {}, "tags": {}, "trial_key": None}),
             '{"session": "b", "op": "sta',
             json.dumps({"session": "a", "op": "log", "run": "pending-a-0", "metrics": {"x": 1.0}, "tags": {}}),
             json.dumps({"session": "a", "op": "close", "token": 0})]
    commands: queue.Queue = queue.Queue()
    for line in lines + [None]:
        commands.put(line.encode() if line else None)
    out = io.StringIO()
    serve(commands, threading.Event(), out)
    answers = [json.loads(line) for line in out.getvalue().splitlines()]
    assert [(a["session"], a["kind"]) for a in answers] == [("a", "error"), ("b", "error"), ("a", "close")]
    assert "could not be read" in answers[0]["error"] and answers[2]["error"] == answers[0]["error"]
    client = MlflowClient(tracking_uri=uri)
    (run,) = client.search_runs([client.get_experiment_by_name("a").experiment_id])
    assert run.info.status == "KILLED" and "x" not in run.data.metrics  # nothing applied after the bad line


def test_the_writer_runs_this_harness_whatever_the_working_folder_holds(tmp_path, monkeypatch):
    from harness.track import queued

    fake = tmp_path / "elsewhere" / "harness"
    fake.mkdir(parents=True)
    (fake / "__init__.py").write_text("raise ImportError('the wrong harness')\n")
    monkeypatch.chdir(tmp_path / "elsewhere")
    writer = queued._WriterProcess()
    try:
        monkeypatch.setattr(queued, "_writer", writer)
        tracker = QueuedTracker(default_tracking_uri(tmp_path), tmp_path / "artifacts", "here")
        tracker.start_run("sweep", None, "sweep", {}, {})
        tracker.flush()
        tracker.close()
        assert tracker.error is None
    finally:
        writer.stop()


def test_relative_paths_are_the_sweeps_own_folder_not_the_writers(tmp_path, monkeypatch):
    """One writer serves a process's sweeps: a relative store and artifact folder are resolved in the sweep's own
    working folder at each sweep, not in the folder the writer started in."""
    from mlflow.tracking import MlflowClient

    for folder in ("first", "second"):
        (tmp_path / folder).mkdir()
        monkeypatch.chdir(tmp_path / folder)
        tracker = QueuedTracker("sqlite:///mlflow.db", Path("artifacts"), "relative")
        run = tracker.start_run("sweep", None, "sweep", {}, {})
        tracker.log_text(run, "hello", "note.txt")
        tracker.end(run, "FINISHED")
        tracker.close()
        assert tracker.error is None
    for folder in ("first", "second"):
        client = MlflowClient(tracking_uri=f"sqlite:///{tmp_path / folder / 'mlflow.db'}")
        experiment = client.get_experiment_by_name("relative")
        assert experiment.artifact_location == (tmp_path / folder / "artifacts" / "relative").as_uri()
        (run,) = client.search_runs([experiment.experiment_id])
        assert client.list_artifacts(run.info.run_id)[0].path == "note.txt"


def test_the_sweep_process_environment_is_the_writers_at_each_session(tmp_path, monkeypatch):
    """MLflow reads its settings (credentials, timeouts) from the environment when it writes: the writer takes the
    sweep process's environment as it is when each session opens, not as it was when the writer started."""
    from harness.track import queued, writer

    sent = []
    monkeypatch.setattr(queued._WriterProcess, "send", lambda self, command: sent.append(command))
    monkeypatch.setenv("HARNESS_PROBE_VARIABLE", "set after the writer started")
    QueuedTracker(default_tracking_uri(tmp_path), tmp_path / "artifacts", "environment")
    (opened,) = [c for c in sent if c["op"] == "open"]
    assert opened["environ"] == dict(os.environ)

    before = dict(os.environ)
    try:
        session = writer._Session({**opened, "environ": {**before, "HARNESS_PROBE_VARIABLE": "the session's"}})
        session.open()
        assert os.environ["HARNESS_PROBE_VARIABLE"] == "the session's"
    finally:
        os.environ.clear()
        os.environ.update(before)


@pytest.mark.parametrize("uri, path", [
    ("sqlite:////abs/folder/mlflow.db", "/abs/folder/mlflow.db"),
    ("sqlite:///relative.db", "relative.db"),
    ("sqlite:////abs/x.db?timeout=20", "/abs/x.db"),
    ("sqlite://", None),
    ("sqlite:///:memory:", None),
    ("http://127.0.0.1:5000", None),
    ("file:///tmp/mlruns", None),
])
def test_sqlite_store_path(uri, path):
    assert sqlite_store_path(uri) == (Path(path) if path else None)


def test_a_store_not_yet_created_is_not_opened_to_read(tmp_path):
    uri = default_tracking_uri(tmp_path)
    assert store_reader(uri, tmp_path / "artifacts", "absent") is None
    assert not (tmp_path / "mlflow.db").exists()  # and nothing was created by asking
    SweepTracker(uri, tmp_path / "artifacts", "other")
    reader = store_reader(uri, tmp_path / "artifacts", "absent")
    assert reader is not None and reader.finished_trials() == {}


SWEEP = """
name: ids
datasets:
  - {{source: synthetic, n_texts: 120, topic_share: 0.4, seed: 3}}
models:
  - {{name: {model}, batch_size: 32}}
grid:
  pooling: [mean, max]
  reduce:
    - {{method: pca, n_components: 4}}
  cluster:
    - {{method: kmeans, k: labels}}
  seeds: [0, 1]
evidence: {{resamples: 50, permutations: 19}}
"""


def test_a_sweep_result_names_mlflow_ids_that_hold_its_runs(tmp_path, tiny_model_dir):
    from mlflow.tracking import MlflowClient

    from harness.engine.runner import run_sweep_file
    from harness.engine.winner_map import MAP_INFO

    result = run_sweep_file(write_sweep(tmp_path, SWEEP.format(model=tiny_model_dir)), tmp_path / "results")
    client = MlflowClient(tracking_uri=result.tracking_uri)
    parent = client.get_run(result.parent_run_id)
    assert parent.data.tags["harness.kind"] == "sweep"
    assert len(result.configurations) == 2 and len(result.results) == 4
    for configuration in result.configurations:
        run = client.get_run(configuration.run_id)
        assert run.data.tags["harness.kind"] == "configuration" and run.data.tags[PARENT_TAG] == result.parent_run_id
        for seed in configuration.seeds:
            seed_run = client.get_run(seed.run_id)
            assert seed_run.data.tags[PARENT_TAG] == configuration.run_id
            assert seed_run.data.tags["harness.trial_key"] == seed.trial.key
            assert seed_run.data.metrics["ari"] == seed.scores["ari"]
    assert {r.run_id for r in result.results} == {s.run_id for c in result.configurations for s in c.seeds}
    winner = next(iter(result.rankings.values())).winner.configuration
    info = json.loads(Path(client.download_artifacts(winner.run_id, MAP_INFO)).read_text())
    assert info["seed_run_id"] == winner.seeds[0].run_id


def test_a_store_failing_during_a_sweep_stops_it_with_one_line_and_no_run_left_running(tmp_path, tiny_model_dir, capsys):
    """The store fails at the sweep's first artifact (its experiment's artifact folder is a file): the sweep stops
    with the store's one-line error and exit 2, and every run the writer had started is KILLED, none RUNNING."""
    from mlflow.tracking import MlflowClient

    from harness.cli import main

    sweep = write_sweep(tmp_path, SWEEP.format(model=tiny_model_dir))
    results = tmp_path / "results"
    results.mkdir()
    uri = default_tracking_uri(results)
    SweepTracker(uri, results / "artifacts", "ids")  # the experiment, with its artifact location
    (results / "artifacts" / "ids").write_text("a file where the runs' artifact folders should go")
    assert main(["run", str(sweep), "--results-dir", str(results), "--no-progress"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith(f"harness: error: tracking store {uri}: ") and len(err.splitlines()) == 1, err
    client = MlflowClient(tracking_uri=uri)
    runs = client.search_runs([client.get_experiment_by_name("ids").experiment_id])
    assert runs and all(r.info.status == "KILLED" for r in runs)


def test_a_store_error_that_arrives_only_at_the_end_still_fails_the_sweep(tmp_path, tiny_model_dir, monkeypatch):
    """The writer's error can come back after the sweep's last write (the writer is behind): close() holds it, and
    the sweep must raise it rather than return results whose runs the store does not hold. Simulated by keeping
    every error from coming back before close."""
    from mlflow.tracking import MlflowClient

    from harness.engine.runner import run_sweep_file

    monkeypatch.setattr(QueuedTracker, "_raise_reported", lambda self: None)
    sweep = write_sweep(tmp_path, SWEEP.format(model=tiny_model_dir))
    results = tmp_path / "results"
    results.mkdir()
    uri = default_tracking_uri(results)
    SweepTracker(uri, results / "artifacts", "ids")
    (results / "artifacts" / "ids").write_text("a file where the runs' artifact folders should go")
    with pytest.raises(HarnessError, match=r"^tracking store "):
        run_sweep_file(sweep, results)
    client = MlflowClient(tracking_uri=uri)
    runs = client.search_runs([client.get_experiment_by_name("ids").experiment_id])
    assert runs and all(r.info.status == "KILLED" for r in runs)


def test_a_store_that_cannot_be_written_fails_the_sweep_before_any_computation(tmp_path, tiny_model_dir, capsys):
    """The sweep waits for its sweep run to be in the store before it computes: a store that cannot be created
    is one line and exit 2, with nothing computed or cached (not found an hour later, after a forward pass)."""
    from harness.cli import main
    from harness.engine.cache import StageCache

    sweep = write_sweep(tmp_path, SWEEP.format(model=tiny_model_dir))
    blocker = tmp_path / "blocker"
    blocker.write_text("a file where the store's folder should be")
    uri = f"sqlite:///{blocker / 'mlflow.db'}"
    results = tmp_path / "results"
    assert main(["run", str(sweep), "--results-dir", str(results), "--tracking-uri", uri, "--no-progress"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith(f"harness: error: tracking store {uri}: ") and len(err.splitlines()) == 1, err
    assert not (results / "cache").exists() or not StageCache(results / "cache").entries()
