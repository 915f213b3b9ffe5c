"""MLflow: one parent run per sweep, one nested child run per trial (the tracking edge).

Runs are created and ended explicitly through MlflowClient, so no global
"active run" state can be left dangling by an error.
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path
from typing import Any, Iterable

from harness.errors import HarnessError

PARENT_TAG = "mlflow.parentRunId"
RUN_NAME_TAG = "mlflow.runName"
KIND_TAG = "harness.kind"
TRIAL_KEY_TAG = "harness.trial_key"
MAX_TAG_LENGTH = 5000


def default_tracking_uri(results_dir: Path) -> str:
    return f"sqlite:///{(results_dir / 'mlflow.db').resolve()}"


class SweepTracker:
    """Creates and ends the runs of one sweep in one MLflow experiment."""

    def __init__(self, tracking_uri: str, artifact_root: Path, experiment_name: str):
        from mlflow.tracking import MlflowClient

        self.tracking_uri = tracking_uri
        self.client = MlflowClient(tracking_uri=tracking_uri)
        try:
            experiment = self.client.get_experiment_by_name(experiment_name)
            if experiment is None:
                artifact_root.mkdir(parents=True, exist_ok=True)
                self.experiment_id = self.client.create_experiment(
                    experiment_name, artifact_location=(artifact_root / experiment_name).resolve().as_uri()
                )
            else:
                self.experiment_id = experiment.experiment_id
        except Exception as err:
            raise HarnessError(f"tracking store {tracking_uri}: cannot open it: {str(err).splitlines()[0]}") from None
        self.parent_id: str | None = None

    def start_sweep(self, name: str, params: dict[str, Any], tags: dict[str, str]) -> str:
        run = self.client.create_run(self.experiment_id, run_name=name, tags={KIND_TAG: "sweep", **tags})
        self.parent_id = run.info.run_id
        self._log(self.parent_id, params=params)
        return self.parent_id

    def start_trial(self, name: str, trial_key: str, params: dict[str, Any], tags: dict[str, str]) -> str:
        run = self.client.create_run(
            self.experiment_id,
            run_name=name,
            tags={PARENT_TAG: self.parent_id, KIND_TAG: "trial", TRIAL_KEY_TAG: trial_key, **tags},
        )
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

    def log_text(self, run_id: str, text: str, file_name: str) -> None:
        with tempfile.TemporaryDirectory() as folder:
            path = Path(folder) / file_name
            path.write_text(text)
            self.client.log_artifact(run_id, str(path))

    def end(self, run_id: str, status: str, error: str | None = None) -> None:
        if error is not None:
            self._log(run_id, tags={"harness.error": error})
        self.client.set_terminated(run_id, status=status)
