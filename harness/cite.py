"""A citation card: the winning configuration as a runnable single-configuration sweep, and what backs it."""

from __future__ import annotations

import subprocess
from importlib import metadata
from pathlib import Path
from typing import Any

import yaml

from harness import __version__
from harness.errors import HarnessError
from harness.readback import SweepRecord
from harness.report import ranked, ranking_metric

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


def winner_sweep(record: SweepRecord, prepared, trial) -> dict[str, Any]:
    """The winning configuration as a sweep: one dataset, one model, one option per axis, the same seeds."""
    dataset = next(spec for spec in prepared.sweep.datasets if getattr(spec, "dataset_name", None) == trial.dataset
                   or getattr(spec, "name", None) == trial.dataset)
    seeds = sorted({t.seed for t in prepared.trials if t.config_key == trial.config_key})
    return {
        "name": f"{record.name}-winner",
        "question": f"Reproduces the winner of sweep '{record.name}' (MLflow run {record.run_id}).",
        "datasets": [{k: v for k, v in dataset.as_params().items() if v is not None}],
        "models": [{"name": trial.model.name, **trial.model.model_dump(mode="json", exclude_defaults=True)}],
        "grid": {
            "pooling": [trial.pooling],
            "layers": [trial.layers],
            "transform": [[step.as_params() for step in trial.transform]],
            "normalize": [trial.normalize],
            "reduce": [trial.reducer.as_params()],
            "cluster": [trial.clusterer.as_params()],
            "seeds": seeds,
        },
        "rank_by": prepared.sweep.rank_by or ranking_metric(record),
        "evidence": prepared.sweep.evidence.as_params(),
        "storage_dtype": prepared.sweep.storage_dtype,
    }


def _fmt(value: Any) -> str:
    return "-" if value is None else f"{value:.4f}"


def citation_markdown(record: SweepRecord, sweep: dict, command: str) -> str:
    metric = ranking_metric(record)
    ordered = [c for c in ranked(record.configurations, metric) if c.dataset == sweep["datasets"][0].get("name", c.dataset)]
    ordered = ordered or ranked(record.configurations, metric)
    winner, runner_up = ordered[0], (ordered[1] if len(ordered) > 1 else None)
    m = winner.metrics
    lines = [f"# Citation card: winner of sweep `{record.name}`", "", f"**Configuration**: `{winner.name}`", "",
             f"Ranked by **{metric}** (mean over {m.get('n_seeds', 1):.0f} seeds).", "", "| score | mean | 95% CI | sd over seeds |",
             "|---|---|---|---|"]
    for name in ("ari", "ami", "nmi", "v_measure", "silhouette", "length_confound_index", "length_leakage_r2",
                 "coverage", "stability_ari", "npmi_mean"):
        if name in m:
            interval = f"[{_fmt(m.get(f'{name}_ci_low'))}, {_fmt(m.get(f'{name}_ci_high'))}]" if f"{name}_ci_low" in m else "-"
            lines.append(f"| {name} | {_fmt(m[name])} | {interval} | {_fmt(m.get(f'{name}_std'))} |")
    if runner_up is not None:
        tied = runner_up.metrics.get("tied_with_leader") == 1.0
        lines += ["", f"**Margin to the runner-up** (`{runner_up.name}`): {metric} "
                  f"{_fmt(m.get(metric, float('nan')) - runner_up.metrics.get(metric, float('nan')))}"
                  f"{' (tied: the paired bootstrap interval of the difference contains 0)' if tied else ' (not tied)'}."]
    lines += ["", "**Data**: " + ", ".join(f"`{name}` (fingerprint `{card.get('fingerprint', '?')}`, {card.get('rows', '?')} texts)"
                                          for name, card in record.cards.items() if name == winner.dataset),
              "", f"**Model**: `{winner.params.get('model')}`, weights SHA-256 `{winner.tags.get('harness.model_weights_sha256')}`, "
              f"source `{winner.tags.get('harness.model_source')}`",
              "", "**Libraries**: " + ", ".join(f"{k} {v}" for k, v in library_versions().items()),
              "", f"**Tool commit**: `{tool_commit()}`",
              "", f"**MLflow**: sweep run `{record.run_id}`, configuration run `{winner.run_id}`, tracking URI `{record.tracking_uri}`",
              "", "**Reproduce**:", "", "```bash", command, "```", ""]
    return "\n".join(lines)


def write_citation(record: SweepRecord, reports_dir: Path, results_dir: Path) -> tuple[Path, Path]:
    from harness.reporting import winner_trial

    metric = ranking_metric(record)
    ordered = ranked(record.configurations, metric)
    if not ordered:
        raise HarnessError(f"sweep '{record.name}': no configuration finished; nothing to cite")
    prepared, trial = winner_trial(record, ordered[0])
    if trial is None:
        raise HarnessError(f"sweep '{record.name}': the sweep file {record.tags.get('harness.sweep_path')} is gone or "
                           "changed since the run; a citation needs the exact settings")
    folder = reports_dir / record.name
    folder.mkdir(parents=True, exist_ok=True)
    sweep = winner_sweep(record, prepared, trial)
    card = folder / "winner.yaml"
    card.write_text(yaml.safe_dump(sweep, sort_keys=False))
    command = f"harness run {card.resolve()} --results-dir {results_dir.resolve()}"
    markdown = folder / "winner.md"
    markdown.write_text(citation_markdown(record, sweep, command))
    record.client.log_artifact(record.run_id, str(card), "citation")
    record.client.log_artifact(record.run_id, str(markdown), "citation")
    return card, markdown
