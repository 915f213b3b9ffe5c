"""Reading a finished sweep back from MLflow (an edge): its runs, metrics and artifacts."""

from __future__ import annotations

import json
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Optional

import pandas as pd

from harness.errors import HarnessError
from harness.tracking import KIND_TAG, PARENT_TAG


@dataclass
class ConfigurationRecord:
    run_id: str
    name: str
    params: dict[str, str]
    metrics: dict[str, float]
    tags: dict[str, str]
    seed_run_ids: list[str] = field(default_factory=list)

    @property
    def dataset(self) -> str:
        return self.params.get("dataset", "")

    @property
    def compute_seconds(self) -> float:
        return sum(self.metrics.get(k, 0.0) for k in ("encode_seconds", "reduce_seconds", "cluster_seconds"))


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

    @property
    def name(self) -> str:
        return self.experiment

    def artifact_table(self, run_id: str, name: str) -> Optional[pd.DataFrame]:
        with tempfile.TemporaryDirectory() as folder:
            try:
                return pd.read_parquet(self.client.download_artifacts(run_id, name, folder))
            except Exception:  # an artifact that is missing (a failed run) is reported as absent
                return None


def _text_artifact(client, run_id: str, name: str) -> Optional[str]:
    with tempfile.TemporaryDirectory() as folder:
        try:
            return Path(client.download_artifacts(run_id, name, folder)).read_text()
        except Exception:  # absent artifact
            return None


def sweep_record(tracking_uri: str, sweep_name_or_run_id: str) -> SweepRecord:
    """The newest FINISHED (or else newest) run of the sweep with this name, or the sweep run with this id."""
    from mlflow.exceptions import MlflowException
    from mlflow.tracking import MlflowClient

    client = MlflowClient(tracking_uri=tracking_uri)
    experiment = client.get_experiment_by_name(sweep_name_or_run_id)
    if experiment is not None:
        runs = client.search_runs([experiment.experiment_id], f"tags.`{KIND_TAG}` = 'sweep'", order_by=["attributes.start_time DESC"])
        if not runs:
            raise HarnessError(f"sweep '{sweep_name_or_run_id}': the experiment has no sweep run in {tracking_uri}")
        finished = [r for r in runs if r.info.status == "FINISHED"]
        parent = (finished or runs)[0]
    else:
        try:
            parent = client.get_run(sweep_name_or_run_id)
        except MlflowException:
            raise HarnessError(f"'{sweep_name_or_run_id}' is neither a sweep name nor a run id in {tracking_uri}") from None
        if parent.data.tags.get(KIND_TAG) != "sweep":
            raise HarnessError(f"run {sweep_name_or_run_id} is a {parent.data.tags.get(KIND_TAG, 'foreign')} run, not a sweep run")
        experiment = client.get_experiment(parent.info.experiment_id)
    children = client.search_runs([experiment.experiment_id], f"tags.`{PARENT_TAG}` = '{parent.info.run_id}'", max_results=5000)
    configurations = []
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
        configurations.append(ConfigurationRecord(
            run_id=run.info.run_id, name=run.info.run_name, params=dict(run.data.params), metrics=dict(run.data.metrics),
            tags=dict(run.data.tags), seed_run_ids=[s.info.run_id for s in sorted(seeds, key=lambda s: s.info.start_time)],
        ))
    cards = _text_artifact(client, parent.info.run_id, "dataset_cards.json")
    return SweepRecord(
        tracking_uri=tracking_uri, experiment=experiment.name, run_id=parent.info.run_id, tags=dict(parent.data.tags),
        params=dict(parent.data.params), sweep_text=_text_artifact(client, parent.info.run_id, "sweep.yaml") or "",
        cards=json.loads(cards) if cards else {}, configurations=configurations, client=client,
    )
