"""The across-corpus verdict of a sweep (or of several finished sweeps): scores gathered, matched, judged.

``harness.score.across`` holds the statistics (pure, on a table of scores). This module gathers that table from
what a run computed or logged: one score per (dataset, configuration), where a configuration is matched
across datasets by its settings (its params without the dataset and the seed), never by its name alone.
It turns the verdict into a JSON payload (logged to the sweep run, read back by the report and the card)
and draws its critical-difference diagram. Pure apart from ``logged_verdict`` and ``verdict_png``'s figure.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from typing import Any, Iterable, Mapping, Optional

from harness.score.across import FEW_DATASETS, AcrossVerdict, across_verdict

VERDICT_ARTIFACT = "across_corpora.json"
DIAGRAM_ARTIFACT = "across_corpora_cd.png"
# Region of practical equivalence for the Bayesian comparison, in the score's units: the scores ranked by
# (ARI, NMI, silhouette, ...) live on [-1, 1] or [0, 1], where Benavoli et al. (2017) use 0.01 for accuracies.
DEFAULT_ROPE = 0.01
BAYES_HINT = "install the optional extra for the Bayesian comparison of the two finalists: pip install 'harness[bayes]'"
# Params that say where and with which seed a configuration ran, not what it is.
NOT_CONFIGURATION = frozenset({"dataset", "seed", "round", "round_texts"})  # round: a halving search's
NOT_APPLICABLE = "n/a"


def configuration_identity(params: Mapping[str, Any]) -> str:
    """A configuration's settings as canonical text: its params, as MLflow stores them (text), without the
    dataset, the seed and settings that do not apply (``n/a``), so one configuration on two corpora, or in two
    sweeps with different grids, has one identity."""
    kept = {k: str(v) for k, v in params.items() if k not in NOT_CONFIGURATION and str(v) != NOT_APPLICABLE}
    return json.dumps(kept, sort_keys=True)


def configuration_label(name: str) -> str:
    """A configuration run's name without its leading dataset part (dataset/model/... -> model/...)."""
    return name.split("/", 1)[1] if "/" in name else name


@dataclass(frozen=True)
class Scored:
    """One configuration's score on one dataset, as ranked there."""

    dataset: str
    identity: str
    label: str
    value: float
    metric: str
    source: str = ""  # the sweep it came from (for ``harness verdict`` over several sweeps)


@dataclass
class GatheredScores:
    """scores[dataset][label], with the labels' settings, each dataset's metric, and what was dropped and why."""

    scores: dict[str, dict[str, float]] = field(default_factory=dict)
    settings: dict[str, dict[str, str]] = field(default_factory=dict)  # label -> params (without dataset, seed)
    metrics: dict[str, str] = field(default_factory=dict)  # dataset -> metric it was ranked by
    sources: dict[str, str] = field(default_factory=dict)  # dataset -> sweep
    dropped: list[str] = field(default_factory=list)


def gathered_scores(scored: Iterable[Scored]) -> GatheredScores:
    """The table of scores, configurations matched by identity. A configuration is labelled by the first name
    seen for its identity; a dataset name met again from another sweep is dropped (counting one corpus twice
    would break the independence the test assumes), and so is a configuration that lacks a score on some dataset."""
    out = GatheredScores()
    labels: dict[str, str] = {}
    for item in scored:
        if item.dataset in out.sources and out.sources[item.dataset] != item.source:
            note = f"dataset {item.dataset} of sweep {item.source}: already given by sweep {out.sources[item.dataset]}"
            if note not in out.dropped:
                out.dropped.append(note)
            continue
        out.sources.setdefault(item.dataset, item.source)
        out.metrics.setdefault(item.dataset, item.metric)
        if item.identity not in labels:
            label = item.label if item.label not in out.settings else f"{item.label} [{len(labels) + 1}]"  # same name, other settings
            labels[item.identity] = label
            out.settings[label] = json.loads(item.identity)
        label = labels[item.identity]
        out.scores.setdefault(item.dataset, {})[label] = item.value
    every = set(out.settings)
    for dataset, row in out.scores.items():
        for label in sorted(every - set(row)):
            out.dropped.append(f"configuration {label}: not run on dataset {dataset}")
    return out


def verdict_of(gathered: GatheredScores, rope: Optional[float] = DEFAULT_ROPE) -> tuple[AcrossVerdict, Optional[str]]:
    """The verdict over configurations scored on every dataset, and a note when the Bayesian comparison was not
    made (the optional package is missing). Needs at least 2 datasets and 2 shared configurations."""
    from harness.errors import DataError

    if len(gathered.scores) < 2:
        raise DataError(f"the across-corpus verdict needs at least 2 datasets; got {len(gathered.scores)}")
    metrics = sorted(set(gathered.metrics.values()))
    metric = metrics[0] if len(metrics) == 1 else "mixed: " + ", ".join(f"{d} by {m}" for d, m in gathered.metrics.items())
    note = None
    if rope is not None:
        try:
            import baycomp  # noqa: F401
        except ImportError:
            rope, note = None, BAYES_HINT
    return across_verdict(gathered.scores, metric=metric, rope=rope), note


def verdict_payload(verdict: AcrossVerdict, gathered: GatheredScores, bayes_note: Optional[str] = None) -> dict[str, Any]:
    """Everything the report and the card show, as plain JSON."""
    f = verdict.friedman
    table = verdict.table
    column = {c: i for i, c in enumerate(table.configurations)}
    return {
        "metric": verdict.metric,
        "metrics": gathered.metrics,
        "alpha": verdict.alpha,
        "datasets": list(table.datasets),
        "sources": gathered.sources,
        "configurations": list(table.configurations),
        "settings": {c: gathered.settings[c] for c in table.configurations},
        "scores": {d: {c: float(table.scores[i, column[c]]) for c in table.configurations} for i, d in enumerate(table.datasets)},
        "ranks": {d: {c: float(verdict.ranks[i, column[c]]) for c in table.configurations} for i, d in enumerate(table.datasets)},
        "average_ranks": dict(verdict.average_ranks),
        "friedman": {"chi2": f.chi2, "chi2_df": f.chi2_df, "chi2_p_value": f.chi2_p_value, "f": _finite(f.f),
                     "f_df": list(f.f_df), "f_p_value": f.f_p_value, "tie_corrected": f.tie_corrected,
                     "unanimous": f.unanimous},
        "q_alpha": verdict.q_alpha,
        "critical_difference": verdict.critical_difference,
        "groups": [list(g) for g in verdict.groups],
        "against_best": [{"configuration": c.configuration, "z": c.z, "p_value": c.p_value, "p_holm": c.p_holm,
                          "significant": c.significant} for c in verdict.against_best],
        "best": verdict.best,
        "winner": verdict.winner,
        "headline": verdict.headline(),
        "test": verdict.test_sentence(),
        "lines": verdict.lines(),
        "caveats": verdict.caveats(),
        "few_datasets": f.n_datasets < FEW_DATASETS,
        "bayesian": None if verdict.bayesian is None else {
            "first": verdict.bayesian.first, "second": verdict.bayesian.second, "rope": verdict.bayesian.rope,
            "p_first_better": verdict.bayesian.p_first_better, "p_equivalent": verdict.bayesian.p_equivalent,
            "p_second_better": verdict.bayesian.p_second_better, "conclusion": verdict.bayesian.conclusion,
            "sentence": verdict.bayesian.sentence()},
        "bayes_note": bayes_note,
        "dropped": gathered.dropped + [f"configuration {c}: no finite score on {', '.join(w)}" for c, w in table.left_out],
    }


def _finite(value: float) -> Optional[float]:
    return value if math.isfinite(value) else None  # JSON has no infinity: a unanimous F is None


def verdict_png(payload: Mapping[str, Any]) -> bytes:
    """The critical-difference diagram of a verdict payload, as PNG bytes."""
    import io

    from harness.cd_diagram import critical_difference_figure
    from harness.plots import pyplot

    figure = critical_difference_figure(payload["average_ranks"], payload["critical_difference"], payload["groups"],
                                        title=f"Average ranks over {len(payload['datasets'])} datasets, by {payload['metric']}")
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=110, bbox_inches="tight")
    pyplot().close(figure)
    return buffer.getvalue()


def run_metrics(payload: Mapping[str, Any]) -> dict[str, float]:
    """The verdict's numbers as MLflow metrics of the sweep run."""
    f = payload["friedman"]
    out = {"across.n_datasets": float(len(payload["datasets"])), "across.n_configurations": float(len(payload["configurations"])),
           "across.friedman_chi2": f["chi2"], "across.friedman_p": f["chi2_p_value"], "across.iman_davenport_p": f["f_p_value"],
           "across.critical_difference": payload["critical_difference"],
           "across.best_average_rank": payload["average_ranks"][payload["best"]]}
    if f["f"] is not None:
        out["across.iman_davenport_f"] = f["f"]
    return out


def run_tags(payload: Mapping[str, Any]) -> dict[str, str]:
    return {"harness.across_best": payload["best"], "harness.across_winner": payload["winner"] or "",
            "harness.across_metric": payload["metric"]}


# --- gathering from a run that just finished and from a logged sweep ------------------------------------------

def scored_from_rankings(rankings: Mapping[str, Any], params: Mapping[str, Mapping[str, Any]], source: str = "") -> list[Scored]:
    """From the run's own rankings (leaderboard.Ranking per dataset): each configuration's ranked value."""
    out = []
    for dataset, ranking in rankings.items():
        for row in ranking.rows:
            first = row.configuration.trials[0]
            out.append(Scored(dataset, configuration_identity(params[first.key]), configuration_label(first.config_name),
                              float(row.value), ranking.metric, source))
    return out


def logged_verdict(record) -> tuple[Optional[dict], Optional[bytes]]:
    """The verdict payload and diagram a sweep run logged, or (None, None) when it logged none."""
    import tempfile
    from pathlib import Path

    with tempfile.TemporaryDirectory() as folder:
        try:
            payload = json.loads(Path(record.client.download_artifacts(record.run_id, VERDICT_ARTIFACT, folder)).read_text())
        except Exception:  # absent: a one-dataset sweep, or a run from before the verdict was logged
            return None, None
        try:
            png = Path(record.client.download_artifacts(record.run_id, DIAGRAM_ARTIFACT, folder)).read_bytes()
        except Exception:
            png = None
    return payload, png
