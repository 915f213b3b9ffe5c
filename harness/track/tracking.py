"""MLflow: one parent run per sweep, one nested child run per trial (the tracking edge).

Runs are created and ended explicitly through MlflowClient, so no global
"active run" state can be left dangling by an error.
"""

from __future__ import annotations

import json
import os
import socket
import tempfile
import time
from pathlib import Path
from typing import Any, Iterable, Optional

from harness.errors import HarnessError
from harness.track.runs_view import EXPERIMENT_KIND_TAG, MODEL_DEVELOPMENT, RANKING_VIEW_TAG, ranking_view_tag

PARENT_TAG = "mlflow.parentRunId"
RUN_NAME_TAG = "mlflow.runName"
KIND_TAG = "harness.kind"
TRIAL_KEY_TAG = "harness.trial_key"
HOST_TAG = "harness.host"
PID_TAG = "harness.pid"
MAX_TAG_LENGTH = 5000
# Each configuration run's settings as a one-configuration sweep (resolved at run time): what a citation reruns.
CONFIGURATION_ARTIFACT = "configuration.json"


def _owner_gone(tags: dict[str, str]) -> bool:
    """Whether the process that started a sweep run is known to be dead (same host, PID gone)."""
    if tags.get(HOST_TAG) != socket.gethostname() or not tags.get(PID_TAG, "").isdigit():
        return False
    pid = int(tags[PID_TAG])
    if pid == os.getpid():
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return True
    except PermissionError:
        return False
    return False


def check_reachable(tracking_uri: str, timeout: float = 5.0) -> None:
    """Fail at once, with one line, when a tracking server does not answer its health check."""
    if not tracking_uri.startswith(("http://", "https://")):
        return
    import urllib.error
    import urllib.request

    try:
        with urllib.request.urlopen(tracking_uri.rstrip("/") + "/health", timeout=timeout) as answer:
            if answer.status == 200:
                return
            reason = f"HTTP {answer.status}"
    except urllib.error.URLError as err:
        reason = str(err.reason)
    except OSError as err:
        reason = str(err)
    raise HarnessError(f"tracking server {tracking_uri}: unreachable ({reason}); start it, or drop --tracking-uri "
                       "to use the local SQLite store")


def default_tracking_uri(results_dir: Path) -> str:
    return f"sqlite:///{(results_dir / 'mlflow.db').resolve()}"


class SweepTracker:
    """Creates and ends the runs of one sweep in one MLflow experiment."""

    def __init__(self, tracking_uri: str, artifact_root: Path, experiment_name: str, *, owner_pid: Optional[int] = None):
        """``owner_pid``: the process whose death leaves these runs orphaned (default this one; a writer process
        that logs for a sweep names the sweep's)."""
        from mlflow.tracking import MlflowClient

        self.tracking_uri = tracking_uri
        self.owner_pid = os.getpid() if owner_pid is None else owner_pid
        check_reachable(tracking_uri)
        self.client = MlflowClient(tracking_uri=tracking_uri)
        try:
            experiment = self.client.get_experiment_by_name(experiment_name)
            if experiment is None:
                location = None  # a tracking server decides where artifacts go
                if not tracking_uri.startswith(("http://", "https://")):
                    artifact_root.mkdir(parents=True, exist_ok=True)
                    location = (artifact_root / experiment_name).resolve().as_uri()
                self.experiment_id = self.client.create_experiment(
                    experiment_name, artifact_location=location, tags={EXPERIMENT_KIND_TAG: MODEL_DEVELOPMENT})
            else:
                self.experiment_id = experiment.experiment_id
                if experiment.tags.get(EXPERIMENT_KIND_TAG) != MODEL_DEVELOPMENT:
                    self.client.set_experiment_tag(self.experiment_id, EXPERIMENT_KIND_TAG, MODEL_DEVELOPMENT)
        except Exception as err:
            raise HarnessError(f"tracking store {tracking_uri}: cannot open it: {str(err).splitlines()[0]}") from None

    def show_ranking(self, sweep_run_id: str, rank_metrics: Iterable[str]) -> None:
        """Save the view that the UI link opens: this sweep run's configurations, best first."""
        self.client.set_experiment_tag(self.experiment_id, RANKING_VIEW_TAG, ranking_view_tag(sweep_run_id, rank_metrics))

    def _runs(self, filter_string: str) -> list:
        runs, token = [], None
        while True:
            page = self.client.search_runs([self.experiment_id], filter_string=filter_string, max_results=1000, page_token=token)
            runs.extend(page)
            token = page.token
            if not token:
                return runs

    def finished_trials(self) -> dict[str, Any]:
        """FINISHED trial runs of this experiment, by trial key (the newest where there are several)."""
        runs = self._runs(f"attributes.status = 'FINISHED' and tags.`{KIND_TAG}` = 'trial'")
        by_key: dict[str, Any] = {}
        for run in sorted(runs, key=lambda r: r.info.start_time):
            by_key[run.data.tags[TRIAL_KEY_TAG]] = run
        return by_key

    def run_table(self, run_id: str, name: str):
        """A Parquet artifact of a run as a DataFrame, or None when it is missing or unreadable."""
        import pandas as pd

        with tempfile.TemporaryDirectory() as folder:
            try:
                return pd.read_parquet(self.client.download_artifacts(run_id, name, folder))
            except Exception:  # a missing or broken artifact: the caller runs the trial again
                return None

    def mark_orphans_killed(self) -> int:
        """Mark KILLED the runs left RUNNING by a process of this host that no longer exists."""
        marked = 0
        for run in self._runs("attributes.status = 'RUNNING'"):
            if _owner_gone(run.data.tags):
                self.client.set_terminated(run.info.run_id, status="KILLED")
                marked += 1
        return marked

    def start_run(self, name: str, parent_id: str | None, kind: str, params: dict[str, Any], tags: dict[str, str],
                  trial_key: str | None = None) -> str:
        """Create a run (nested under ``parent_id`` when given) with its params; every run records its host and PID."""
        tags = {KIND_TAG: kind, HOST_TAG: socket.gethostname(), PID_TAG: str(self.owner_pid), **tags}
        if parent_id is not None:
            tags[PARENT_TAG] = parent_id
        if trial_key is not None:
            tags[TRIAL_KEY_TAG] = trial_key
        run = self.client.create_run(self.experiment_id, run_name=name, tags=tags)
        self._log(run.info.run_id, params=params)
        return run.info.run_id

    def _log(self, run_id: str, params: dict | None = None, metrics: dict | None = None, tags: dict | None = None) -> None:
        from mlflow.entities import Metric, Param, RunTag

        now = int(time.time() * 1000)
        self.client.log_batch(
            run_id,
            metrics=[Metric(k, float(v), now, 0) for k, v in (metrics or {}).items() if v is not None],
            params=[Param(k, str(v)) for k, v in (params or {}).items()],
            tags=[RunTag(k, str(v)[:MAX_TAG_LENGTH]) for k, v in (tags or {}).items()],
        )

    def log_results(self, run_id: str, metrics: dict[str, float], tags: dict[str, str] | None = None) -> None:
        self._log(run_id, metrics=metrics, tags=tags)

    def log_files(self, run_id: str, files: Iterable[Path], artifact_path: str | None = None) -> None:
        for path in files:
            self.client.log_artifact(run_id, str(path), artifact_path)

    def log_folder(self, run_id: str, folder: Path) -> None:
        """Every file of a folder as the run's artifacts, in one call."""
        self.log_folder_as(run_id, folder, None)

    def log_folder_as(self, run_id: str, folder: Path, artifact_path: Optional[str]) -> None:
        """Every file of a folder as the run's artifacts, under ``artifact_path`` (None: at the top)."""
        self.client.log_artifacts(run_id, str(folder), artifact_path)

    def log_text(self, run_id: str, text: str, file_name: str) -> None:
        with tempfile.TemporaryDirectory() as folder:
            path = Path(folder) / file_name
            path.write_text(text)
            self.client.log_artifact(run_id, str(path))

    def log_dataset(self, run_id: str, name: str, digest: str, source_type: str, source: str, profile: dict) -> None:
        """Record the data a run saw through MLflow's dataset tracking (name, digest, source)."""
        from mlflow.entities import Dataset, DatasetInput, InputTag

        dataset = Dataset(name=name, digest=digest, source_type=source_type, source=json.dumps({"uri": source}),
                          schema=None, profile=json.dumps(profile))
        self.client.log_inputs(run_id, [DatasetInput(dataset, tags=[InputTag("mlflow.data.context", "clustering")])])

    def end(self, run_id: str, status: str, error: str | None = None) -> None:
        if error is not None:
            self._log(run_id, tags={"harness.error": error})
        self.client.set_terminated(run_id, status=status)


def sweep_experiments(tracking_uri: str) -> list[tuple[str, str]]:
    """(name, id) of every experiment holding a sweep run, each made to open on its ranking view.

    Stores written by an older harness lack the experiment kind and the view: they are added here, the view
    showing the newest sweep run and the score it ranks by (ari and silhouette where the sweep left the default).
    """
    from mlflow.tracking import MlflowClient

    client = MlflowClient(tracking_uri=tracking_uri)
    found = []
    for experiment in client.search_experiments():
        newest = client.search_runs([experiment.experiment_id], f"tags.`{KIND_TAG}` = 'sweep'",
                                    order_by=["attributes.start_time DESC"], max_results=1)
        if not newest:
            continue
        if experiment.tags.get(EXPERIMENT_KIND_TAG) != MODEL_DEVELOPMENT:
            client.set_experiment_tag(experiment.experiment_id, EXPERIMENT_KIND_TAG, MODEL_DEVELOPMENT)
        if RANKING_VIEW_TAG not in experiment.tags:
            rank_by = newest[0].data.params.get("rank_by", "default")
            metrics = ["ari", "silhouette"] if rank_by == "default" else [rank_by]
            client.set_experiment_tag(experiment.experiment_id, RANKING_VIEW_TAG,
                                      ranking_view_tag(newest[0].info.run_id, metrics))
        found.append((experiment.name, experiment.experiment_id))
    return sorted(found)
