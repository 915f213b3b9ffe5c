"""A citation card: the winning configuration as a runnable single-configuration sweep, and what backs it."""

from __future__ import annotations

import json
import subprocess
from dataclasses import dataclass
from importlib import metadata
from pathlib import Path
from typing import Any, Optional

import yaml

from harness import __version__
from harness.errors import HarnessError
from harness.review.page import (
    DatasetRanking,
    dataset_rankings,
    distinct_safe_names,
    fewer_valid_seeds,
    interval_scope,
    md_text,
    provisional,
    run_notes,
    safe_name,
    stability_applies,
    valid_seeds,
)
from harness.track.readback import ConfigurationRecord, SweepRecord
from harness.track.tracking import CONFIGURATION_ARTIFACT

LIBRARIES = ("torch", "transformers", "sentence-transformers", "umap-learn", "hdbscan", "scikit-learn", "mlflow", "numpy")


def library_versions() -> dict[str, str]:
    versions = {"harness": __version__}
    for name in LIBRARIES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = "absent"
    return versions


def tool_commit() -> str:
    """The git commit of the tool's source (with -dirty when it has uncommitted changes), or 'unknown'."""
    source = Path(__file__).resolve().parent
    try:
        commit = subprocess.run(["git", "rev-parse", "HEAD"], cwd=source, capture_output=True, text=True, timeout=10)
        dirty = subprocess.run(["git", "status", "--porcelain", "--", "."], cwd=source, capture_output=True, text=True, timeout=10)
    except (OSError, subprocess.TimeoutExpired):
        return "unknown"
    if commit.returncode != 0:
        return "unknown"
    return commit.stdout.strip() + ("-dirty" if dirty.stdout.strip() else "")


def logged_configuration(record: SweepRecord, configuration: ConfigurationRecord) -> dict[str, Any]:
    """The configuration's settings as the run logged them (``configuration.json``: a one-configuration sweep,
    resolved at run time); a one-line error where the run logged none or it is unreadable."""
    text = record.artifact_text(configuration.run_id, CONFIGURATION_ARTIFACT)
    if text is None:
        raise HarnessError(f"sweep '{record.name}': configuration run {configuration.run_id} has no {CONFIGURATION_ARTIFACT} "
                           "(runs made before harness logged each configuration's settings have none); a citation needs "
                           "the exact settings: run the sweep again, finished trials are reused")
    try:
        settings = json.loads(text)
    except ValueError:
        settings = None
    if not isinstance(settings, dict) or not all(key in settings for key in CONFIGURATION_KEYS):
        raise HarnessError(f"sweep '{record.name}': {CONFIGURATION_ARTIFACT} of configuration run {configuration.run_id}: "
                           f"expected a JSON object with the keys {', '.join(CONFIGURATION_KEYS)}")
    return settings


CONFIGURATION_KEYS = ("datasets", "models", "grid", "rank_by", "evidence", "storage_dtype")


def winner_sweep(record: SweepRecord, ranking: DatasetRanking, name: str) -> dict[str, Any]:
    """The winning configuration as a sweep: one dataset, one model, one option per axis, the same seeds, and
    the same texts (a dataset that balanced lengths names the tokenizer it was balanced with), all as the run
    logged them."""
    settings = logged_configuration(record, ranking.winner)
    return {
        "name": name,
        "question": f"Reproduces the winner on dataset '{ranking.dataset}' of sweep '{record.name}' (MLflow run {record.run_id}).",
        **{key: settings[key] for key in CONFIGURATION_KEYS},
        "rank_by": settings["rank_by"] or ranking.metric,
    }


def _fmt(value: Any) -> str:
    return "-" if value is None or value != value else f"{value:.4f}"


CARD_SCORES = ("ari", "ami", "nmi", "v_measure", "silhouette", "length_confound_index", "length_leakage_r2", "coverage",
               "stability_ari", "npmi_mean")


def _score_rows(winner: ConfigurationRecord) -> list[str]:
    m = winner.metrics
    rows = ["| score | mean | 95% CI | sd over seeds | seeds with a value |", "|---|---|---|---|---|"]
    for name in CARD_SCORES:
        if name == "stability_ari" and not stability_applies(winner):
            rows.append("| stability_ari | n/a: seed-free pipeline (every stage ignores the seed) | - | - | - |")
            continue
        if name in m:
            interval = f"[{_fmt(m.get(f'{name}_ci_low'))}, {_fmt(m.get(f'{name}_ci_high'))}]" if f"{name}_ci_low" in m else "-"
            valid, total = valid_seeds(winner, name)
            seeds = "-" if valid is None else f"{valid} of {total}"
            rows.append(f"| {name} | {_fmt(m[name])} | {interval} | {_fmt(m.get(f'{name}_std'))} | {seeds} |")
    return rows


def _evidence_lines(winner: ConfigurationRecord, metric: str) -> list[str]:
    """What the seeds back: the verdict's standing, what the interval covers, seeds without a value."""
    lines = []
    if provisional(winner):
        lines += ["", f"**Verdict: provisional.** Fewer than 3 seeds: the intervals and the tie flag cover "
                  f"{interval_scope(winner) or 'text sampling only'}, not the spread over seeds."]
    elif interval_scope(winner):
        lines += ["", f"**Intervals cover**: {interval_scope(winner)}."]
    if fewer_valid_seeds(winner, metric):
        valid, total = valid_seeds(winner, metric)
        lines += ["", f"**Ranked on {valid} of {total} seeds**: the other seeds gave no finite {metric}."]
    if any(f"{name}_ci_low" in winner.metrics for name in ("nmi", "v_measure")):
        lines += ["", "**NMI and V-measure** are not corrected for chance: they read high on a finite sample, more so "
                      "with more clusters, and their intervals are for the score another sample of this size would give "
                      "on average, not for the population's value (ARI's and AMI's are). Compare configurations with "
                      "different numbers of clusters by ARI or AMI."]
    return lines


def citation_markdown(record: SweepRecord, ranking: DatasetRanking, command: str) -> str:
    """The card of one dataset's winner; the runner-up is the next configuration of the same dataset."""
    metric, winner = ranking.metric, ranking.winner
    runner_up = ranking.runner_up
    m = winner.metrics
    seeds = m.get("n_seeds", 1)
    lines = [f"# Citation card: winner of sweep `{record.name}` on dataset `{ranking.dataset}`", ""]
    notes = run_notes(record)
    if notes:
        lines += ["**This run is not complete.**", ""] + [f"- {md_text(note)}" for note in notes] + [""]
    lines += [f"**Configuration**: `{winner.name}`", "",
              f"Ranked by **{metric}** among the {len(ranking.ordered)} configurations of dataset `{ranking.dataset}` "
              f"(mean over {seeds:.0f} seeds)."]
    lines += _evidence_lines(winner, metric)
    lines += [""] + _score_rows(winner)
    if runner_up is not None:
        tied = runner_up.metrics.get("tied_with_leader") == 1.0
        margin = m.get(metric, float("nan")) - runner_up.metrics.get(metric, float("nan"))
        verdict = " (tied: the paired bootstrap interval of the difference contains 0)" if tied else (
            " (not tied)" if "tied_with_leader" in runner_up.metrics else " (no tie test for this metric)")
        lines += ["", f"**Margin to the runner-up** (`{runner_up.name}`, same dataset): {metric} {_fmt(margin)}"
                  f"{verdict if margin == margin else ' (the runner-up has no score: it did not finish)'}."]
    card = record.cards.get(ranking.dataset, {})
    lines += ["", f"**Data**: `{ranking.dataset}` (fingerprint `{card.get('fingerprint', '?')}`, {card.get('rows', '?')} texts)",
              "", f"**Model**: `{winner.params.get('model')}`, weights SHA-256 `{winner.tags.get('harness.model_weights_sha256')}`, "
              f"source `{winner.tags.get('harness.model_source')}`",
              "", "**Libraries**: " + ", ".join(f"{k} {v}" for k, v in library_versions().items()),
              "", f"**Tool commit**: `{tool_commit()}`",
              "", f"**MLflow**: sweep run `{record.run_id}` (status {record.status}), configuration run `{winner.run_id}`, "
              f"tracking URI `{record.tracking_uri}`",
              "", "**Reproduce**:", "", "```bash", command, "```", ""]
    return "\n".join(lines)


@dataclass(frozen=True)
class Citation:
    dataset: str
    sweep_file: Path  # the runnable one-configuration sweep
    card: Path  # the Markdown card
    command: str


def write_citations(record: SweepRecord, reports_dir: Path, results_dir: Path, dataset: Optional[str] = None) -> list[Citation]:
    """One card per dataset (the winner of each), or only ``dataset``'s. With one dataset the files are
    winner.yaml and winner.md; with several, winner-DATASET.yaml and winner-DATASET.md."""
    from harness.review.build import report_folder

    rankings = dataset_rankings(record)
    if dataset is not None:
        rankings = [r for r in rankings if r.dataset == dataset]
        if not rankings:
            raise HarnessError(f"--dataset {dataset}: sweep '{record.name}' has no such dataset; it has "
                               f"{', '.join(record.datasets) or 'none'}")
    cited = [r for r in rankings if r.winner is not None]
    if not cited:
        where = f"dataset '{dataset}'" if dataset is not None else "any dataset"
        raise HarnessError(f"sweep '{record.name}': no configuration finished on {where}; nothing to cite")
    several = len(record.datasets) > 1
    suffixes = {name: f"-{safe}" for name, safe in distinct_safe_names(record.datasets).items()} if several else {}
    # Every card's settings first: a run that logged none is refused before anything is written.
    sweeps = {ranking.dataset: winner_sweep(record, ranking, f"{safe_name(record.name, 'sweep')}-winner"
                                             f"{suffixes.get(ranking.dataset, '')}") for ranking in cited}
    folder = report_folder(reports_dir, record)
    folder.mkdir(parents=True, exist_ok=True)
    citations = []
    for ranking in cited:
        suffix = suffixes.get(ranking.dataset, "")
        sweep = sweeps[ranking.dataset]
        sweep_file = folder / f"winner{suffix}.yaml"
        sweep_file.write_text(yaml.safe_dump(sweep, sort_keys=False))
        command = f"harness run {sweep_file.resolve()} --results-dir {results_dir.resolve()}"
        card = folder / f"winner{suffix}.md"
        card.write_text(citation_markdown(record, ranking, command))
        record.log_artifact(record.run_id, sweep_file, "citation")
        record.log_artifact(record.run_id, card, "citation")
        citations.append(Citation(ranking.dataset, sweep_file, card, command))
    return citations
