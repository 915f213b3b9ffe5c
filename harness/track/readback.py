"""Reading a finished sweep back from MLflow (an edge): its runs, metrics and artifacts."""

from __future__ import annotations

import json
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Optional
from urllib.parse import unquote, urlparse

import pandas as pd

from harness.errors import HarnessError
from harness.track.tracking import KIND_TAG, PARENT_TAG


@dataclass
class ConfigurationRecord:
    run_id: str
    name: str
    params: dict[str, str]
    metrics: dict[str, float]
    tags: dict[str, str]
    seed_run_ids: list[str] = field(default_factory=list)
    status: str = "FINISHED"

    @property
    def dataset(self) -> str:
        return self.params.get("dataset", "")

    @property
    def compute_seconds(self) -> float:
        return sum(self.metrics.get(k, 0.0) for k in ("encode_seconds", "reduce_seconds", "cluster_seconds"))


@dataclass(frozen=True)
class UnfinishedTrial:
    """A seed run of this sweep run that did not finish: its name, status and first line of error."""

    name: str
    status: str
    error: str


def store_folder(tracking_uri: str) -> Optional[Path]:
    """The folder of a local SQLite store (``sqlite:///PATH``), or None for any other store."""
    prefix = "sqlite:///"
    if not tracking_uri.startswith(prefix):
        return None
    return Path(unquote(tracking_uri[len(prefix):])).resolve().parent


def _local_path(uri: str) -> Optional[Path]:
    """The local path of a ``file:`` URI or of a plain absolute path; None for any other scheme."""
    parsed = urlparse(uri)
    if parsed.scheme == "file":
        return Path(unquote(parsed.path))
    if parsed.scheme == "" and uri.startswith("/"):
        return Path(uri)
    return None


def relocated_artifact_uri(artifact_uri: str, recorded_results_dir: str, folder: Optional[Path]) -> Optional[str]:
    """Where a run's artifacts lie when its results folder was moved, or None where nothing moved.

    A local store records absolute artifact locations (RESULTS_DIR/artifacts/...). When the store is read from
    another folder than the results folder the run recorded (``harness.results_dir``), its artifacts are looked
    for at the same place relative to the store's folder: a results folder copied whole works anywhere. Artifacts
    outside the recorded results folder, on a server or in object storage are not moved."""
    if folder is None or not recorded_results_dir:
        return None
    path, recorded = _local_path(artifact_uri), Path(recorded_results_dir)
    if path is None or not path.is_relative_to(recorded) or folder == recorded:
        return None
    return (folder / path.relative_to(recorded)).as_uri()


@dataclass
class SweepRecord:
    """A sweep run and everything under it that a report or a citation needs."""

    tracking_uri: str
    experiment: str
    run_id: str
    tags: dict[str, str]
    params: dict[str, str]
    sweep_text: str
    cards: dict[str, Any]
    configurations: list[ConfigurationRecord]
    client: Any = field(repr=False, default=None)
    status: str = "FINISHED"
    metrics: dict[str, float] = field(default_factory=dict)
    unfinished_trials: list[UnfinishedTrial] = field(default_factory=list)
    artifact_uris: dict[str, str] = field(default_factory=dict, repr=False)  # run id -> artifact URI as recorded

    @property
    def name(self) -> str:
        return self.experiment

    @property
    def datasets(self) -> list[str]:
        """Dataset names in the sweep's order (the cards'), then any others its configurations name."""
        return list(dict.fromkeys([*self.cards, *(c.dataset for c in self.configurations)]))

    def artifact_folder(self, run_id: str) -> Optional[Path]:
        """The local folder of a run's artifacts where the results folder was moved (see relocated_artifact_uri);
        None where MLflow's own location stands. The recorded one is kept where the moved one is missing and the
        recorded one is there (a store copied without its artifacts, next to the original)."""
        recorded = self.artifact_uris.get(run_id)
        if recorded is None:
            recorded = self.client.get_run(run_id).info.artifact_uri
            self.artifact_uris[run_id] = recorded
        moved = relocated_artifact_uri(recorded, self.tags.get("harness.results_dir", ""), store_folder(self.tracking_uri))
        if moved is None:
            return None
        moved_path, recorded_path = _local_path(moved), _local_path(recorded)
        if not moved_path.exists() and recorded_path is not None and recorded_path.exists():
            return None
        return moved_path

    def artifact_file(self, run_id: str, name: str, folder: str) -> Path:
        """A run's artifact as a local file (downloaded into ``folder`` where it is not local); raises if absent."""
        moved = self.artifact_folder(run_id)
        if moved is None:
            return Path(self.client.download_artifacts(run_id, name, folder))
        path = moved / name
        if not path.is_file():
            raise FileNotFoundError(f"{path}: no such artifact")
        return path

    def artifact_table(self, run_id: str, name: str) -> Optional[pd.DataFrame]:
        with tempfile.TemporaryDirectory() as folder:
            try:
                return pd.read_parquet(self.artifact_file(run_id, name, folder))
            except Exception:  # an artifact that is missing (a failed run) is reported as absent
                return None

    def artifact_text(self, run_id: str, name: str) -> Optional[str]:
        with tempfile.TemporaryDirectory() as folder:
            try:
                return self.artifact_file(run_id, name, folder).read_text()
            except Exception:  # absent artifact
                return None

    def log_artifact(self, run_id: str, path: Path, artifact_path: Optional[str] = None) -> None:
        """Log a file to a run, next to the run's other artifacts wherever the results folder now is."""
        moved = self.artifact_folder(run_id)
        if moved is None:
            self.client.log_artifact(run_id, str(path), artifact_path)
            return
        from mlflow.store.artifact.local_artifact_repo import LocalArtifactRepository

        LocalArtifactRepository(moved.as_uri()).log_artifact(str(path), artifact_path)


def _sweep_run(client, tracking_uri: str, sweep: Optional[str], run_id: Optional[str]):
    """The sweep run asked for: ``run_id``, else the newest run of the sweep named ``sweep`` (whatever its
    status: a rerun in which a trial failed is still the newest word), else ``sweep`` read as a run id."""
    from mlflow.exceptions import MlflowException

    asked_by_id = run_id is not None
    if run_id is None and sweep is not None:
        experiment = client.get_experiment_by_name(sweep)
        if experiment is not None:
            runs = client.search_runs([experiment.experiment_id], f"tags.`{KIND_TAG}` = 'sweep'",
                                      order_by=["attributes.start_time DESC"], max_results=1)
            if not runs:
                raise HarnessError(f"sweep '{sweep}': the experiment has no sweep run in {tracking_uri}")
            return runs[0], experiment
        run_id, sweep = sweep, None
    if run_id is None:
        raise HarnessError("name a sweep or give --run-id")
    try:
        parent = client.get_run(run_id)
    except MlflowException:
        if asked_by_id:
            raise HarnessError(f"--run-id {run_id}: no such run in {tracking_uri}") from None
        raise HarnessError(f"'{run_id}' is neither a sweep name nor a run id in {tracking_uri}") from None
    if parent.data.tags.get(KIND_TAG) != "sweep":
        raise HarnessError(f"run {run_id} is a {parent.data.tags.get(KIND_TAG, 'foreign')} run, not a sweep run")
    experiment = client.get_experiment(parent.info.experiment_id)
    if sweep is not None and experiment.name != sweep:
        raise HarnessError(f"run {run_id} belongs to sweep '{experiment.name}', not '{sweep}'")
    return parent, experiment


def sweep_record(tracking_uri: str, sweep: Optional[str] = None, run_id: Optional[str] = None) -> SweepRecord:
    """The sweep run with id ``run_id``, or the newest run of the sweep named ``sweep`` (a name or a run id)."""
    from mlflow.tracking import MlflowClient

    client = MlflowClient(tracking_uri=tracking_uri)
    parent, experiment = _sweep_run(client, tracking_uri, sweep, run_id)
    children = client.search_runs([experiment.experiment_id], f"tags.`{PARENT_TAG}` = '{parent.info.run_id}'", max_results=5000)
    configurations, unfinished = [], []
    artifact_uris = {parent.info.run_id: parent.info.artifact_uri}
    for run in children:
        if run.data.tags.get(KIND_TAG) != "configuration":
            continue
        # Seeds are found by configuration key: a resumed sweep reuses seed runs that hang under an earlier run.
        seeds = client.search_runs(
            [experiment.experiment_id],
            f"tags.`harness.config_key` = '{run.data.tags.get('harness.config_key', '')}' and tags.`{KIND_TAG}` = 'trial' "
            "and attributes.status = 'FINISHED'", max_results=1000)
        newest = {}
        for seed in sorted(seeds, key=lambda s: s.info.start_time):
            newest[seed.data.tags.get("harness.trial_key")] = seed
        seeds = list(newest.values())
        artifact_uris.update({r.info.run_id: r.info.artifact_uri for r in [run, *seeds]})
        configurations.append(ConfigurationRecord(
            run_id=run.info.run_id, name=run.info.run_name, params=dict(run.data.params), metrics=dict(run.data.metrics),
            tags=dict(run.data.tags), seed_run_ids=[s.info.run_id for s in sorted(seeds, key=lambda s: s.info.start_time)],
            status=run.info.status,
        ))
        if run.info.status != "FINISHED":
            own = client.search_runs([experiment.experiment_id], f"tags.`{PARENT_TAG}` = '{run.info.run_id}'", max_results=1000)
            unfinished += [UnfinishedTrial(seed.info.run_name, seed.info.status, seed.data.tags.get("harness.error", ""))
                           for seed in sorted(own, key=lambda s: s.info.start_time) if seed.info.status != "FINISHED"]
    record = SweepRecord(
        tracking_uri=tracking_uri, experiment=experiment.name, run_id=parent.info.run_id, tags=dict(parent.data.tags),
        params=dict(parent.data.params), sweep_text="", cards={}, configurations=configurations, client=client,
        status=parent.info.status, metrics=dict(parent.data.metrics), unfinished_trials=unfinished,
        artifact_uris=artifact_uris,
    )
    record.sweep_text = record.artifact_text(parent.info.run_id, "sweep.yaml") or ""
    cards = record.artifact_text(parent.info.run_id, "dataset_cards.json")
    record.cards = json.loads(cards) if cards else {}
    return record
