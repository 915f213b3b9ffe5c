"""What the MLflow UI shows first for a sweep: the experiment's kind and a saved view of its ranking (pure).

MLflow 3 opens an experiment without a kind on its GenAI pages (traces, latency, tokens). The UI reads
the experiment tag ``mlflow.experimentKind``; ``custom_model_development`` makes it open on the runs
table (mlflow/server/js: ``ExperimentKind.CUSTOM_MODEL_DEVELOPMENT``, and the hook
``useNavigateToExperimentPageTab``, whose test expects the runs tab for that kind).

The runs table's sort, filter, columns and expanded rows can be saved as an experiment tag
``mlflow.sharedViewState.<key>`` and opened with ``#/experiments/<id>/runs?viewStateShareKey=<key>``:
the mechanism behind the UI's own "share view" (``useSharedExperimentViewState``). MLflow nests child
runs under their parent only when the table is sorted by creation time with no filter
(``shouldNestChildrenAndFetchParents``), so a view sorted by rank lists the sweep run's configuration
runs on their own, filtered by their parent.
"""

from __future__ import annotations

import json
from typing import Iterable

EXPERIMENT_KIND_TAG = "mlflow.experimentKind"
MODEL_DEVELOPMENT = "custom_model_development"
SHARED_VIEW_TAG_PREFIX = "mlflow.sharedViewState."
RANKING_VIEW = "harness-ranking"
RANKING_VIEW_TAG = SHARED_VIEW_TAG_PREFIX + RANKING_VIEW


# The settings that tell configurations apart, shown after the scores (the UI puts metrics before params).
SETTING_COLUMNS = ("dataset", "pooling", "layers", "transform", "reduce.method", "cluster.method")


def _column(kind: str, name: str) -> str:
    return f"{kind}.`{name}`"  # MLflow's canonical column key (makeCanonicalSortKey)


def ranking_view(sweep_run_id: str, rank_metrics: Iterable[str]) -> dict:
    """The configuration runs of one sweep run, best first: rank, the ranking score, the tie flag, the length index
    and the settings. Intervals and every other score are one click away (Columns); a wider first screen would push
    the length index out of sight."""
    metrics = ["rank", *rank_metrics, "tied_with_leader", "length_confound_index"]
    return {
        "searchFilter": f"tags.`mlflow.parentRunId` = '{sweep_run_id}' and tags.`harness.kind` = 'configuration'",
        "orderByKey": _column("metrics", "rank"),
        "orderByAsc": True,
        "selectedColumns": [_column("metrics", m) for m in dict.fromkeys(metrics)]
                           + [_column("params", p) for p in SETTING_COLUMNS],
        "runsExpanded": {},
    }


def ranking_view_tag(sweep_run_id: str, rank_metrics: Iterable[str]) -> str:
    return json.dumps(ranking_view(sweep_run_id, rank_metrics), separators=(",", ":"))


def runs_page_link(base_url: str, experiment_id: str) -> str:
    """The address that opens a sweep's experiment on its ranking view."""
    return f"{base_url.rstrip('/')}/#/experiments/{experiment_id}/runs?viewStateShareKey={RANKING_VIEW}"
