"""Running a sweep: load, check against the data, then compute, score and log every trial.

Nothing is written (no MLflow run, no file) until the sweep and its data have
passed every check; after that, a trial that raises becomes a FAILED run and the
sweep goes on.
"""

from __future__ import annotations

import hashlib
import json
import tempfile
import traceback
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Optional

import numpy as np

from harness import __version__
from harness.cluster import clustering_limits
from harness.datasets import Corpus, dataset_name, loaded_corpus, needs_tokenizer
from harness.errors import HarnessError
from harness.layers import layer_choice_fits, output_width
from harness.models import ResolvedModel, resolve_model
from harness.plan import Trial, aligned_params, dataset_key, planned_trials
from harness.reduce import reduction_limits
from harness.sweep import Sweep, load_sweep, sweep_error_at

ProgressFactory = Callable[..., Any]


@dataclass
class PreparedSweep:
    """A parsed sweep with its models resolved and its trials planned; no data loaded."""

    path: Path
    sweep: Sweep
    models: dict[str, ResolvedModel]
    dataset_keys: dict[str, str]
    trials: list[Trial]


@dataclass
class TrialResult:
    trial: Trial
    status: str
    scores: dict[str, float] = field(default_factory=dict)
    error: Optional[str] = None
    run_id: Optional[str] = None


@dataclass
class SweepResult:
    parent_run_id: str
    tracking_uri: str
    results: list[TrialResult]
    work: dict[str, int]
    rank_by: str

    @property
    def failed(self) -> list[TrialResult]:
        return [r for r in self.results if r.status == "FAILED"]

    def leaderboard(self) -> list[dict[str, Any]]:
        return _leaderboard(self.results, self.rank_by)


def _leaderboard(results: list[TrialResult], rank_by: str) -> list[dict[str, Any]]:
    from harness.leaderboard import ranked

    return ranked([{"trial": r.trial.name, **r.scores} for r in results if r.status in ("FINISHED", "REUSED")], rank_by)


def prepared_sweep(path: str | Path) -> PreparedSweep:
    """Parse the sweep, resolve its models and plan its trials."""
    path = Path(path)
    sweep = load_sweep(path)
    models = {}
    for index, spec in enumerate(sweep.models):
        try:
            models[spec.name] = resolve_model(spec.name, spec.revision)
        except HarnessError as err:
            raise sweep_error_at(path, ["models", index, "name"], str(err)) from None
    first_model = models[sweep.models[0].name]
    keys = {
        dataset_name(spec): dataset_key(spec, first_model.weights_digest if needs_tokenizer(spec) else None)
        for spec in sweep.datasets
    }
    return PreparedSweep(path=path, sweep=sweep, models=models, dataset_keys=keys, trials=planned_trials(sweep, keys, models))


def loaded_corpora(prepared: PreparedSweep) -> dict[str, Corpus]:
    """Load every dataset; a data problem is reported at the sweep entry that names the data.

    Sources that balance lengths measure them with the tokenizer of the sweep's first model.
    """
    from harness.datasets.card import tokenizer_counter

    corpora = {}
    count_tokens = None
    for index, spec in enumerate(prepared.sweep.datasets):
        if needs_tokenizer(spec) and count_tokens is None:
            count_tokens = tokenizer_counter(prepared.models[prepared.sweep.models[0].name].folder)
        try:
            corpora[dataset_name(spec)] = loaded_corpus(spec, count_tokens)
        except HarnessError as err:
            raise sweep_error_at(prepared.path, ["datasets", index], str(err)) from None
    return corpora


def check_against_data(prepared: PreparedSweep, corpora: dict[str, Corpus]) -> None:
    """Refuse settings that cannot run on these corpora and models, naming the sweep key."""
    grid = prepared.sweep.grid
    for corpus in corpora.values():
        for m_index, spec in enumerate(prepared.sweep.models):
            model = prepared.models[spec.name]
            for index, layers in enumerate(grid.layers):
                if not layer_choice_fits(layers, model.n_hidden_states):
                    raise sweep_error_at(prepared.path, ["grid", "layers", index],
                        f"{layers!r} does not fit '{spec.name}', which has {model.n_hidden_states} hidden states "
                        f"(embeddings + {model.n_hidden_states - 1} layers)")
            widths = {output_width(layers, model.width) for layers in grid.layers}
            for index, reducer in enumerate(grid.reduce):
                for width in sorted(widths):
                    problem = reduction_limits(reducer, corpus.n_texts, width)
                    if problem:
                        raise sweep_error_at(prepared.path, ["grid", "reduce", index],
                            f"{problem} (dataset '{corpus.name}', model '{spec.name}')")
        for index, clusterer in enumerate(grid.cluster):
            problem = clustering_limits(clusterer, corpus.n_texts, corpus.n_classes)
            if problem:
                raise sweep_error_at(prepared.path, ["grid", "cluster", index], f"{problem} (dataset '{corpus.name}')")


def _assignments_table(corpus: Corpus, clusters: np.ndarray, counts: np.ndarray):
    import pandas as pd

    return pd.DataFrame({
        "id": corpus.ids,
        "label": corpus.labels if corpus.labels is not None else pd.array([None] * corpus.n_texts, dtype="Int64"),
        "cluster": clusters,
        "token_count": counts,
    })


def _source_type(corpus: Corpus) -> str:
    return corpus.source.split(":", 1)[0] if ":" in corpus.source else ("synthetic" if corpus.source == "synthetic" else "local")


def dataset_cards(corpora: dict[str, Corpus], model: ResolvedModel) -> dict[str, dict]:
    """The card of each loaded corpus, lengths measured with the tokenizer of the sweep's first model."""
    from harness.datasets.card import corpus_card, tokenizer_counter

    count = tokenizer_counter(model.folder)
    return {name: {**corpus_card(corpus, count), "length_tokenizer": model.name} for name, corpus in corpora.items()}


def _file_sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def run_trial(executor, trial: Trial, corpus: Corpus) -> tuple[dict[str, float], np.ndarray, np.ndarray]:
    """Compute (or reuse) the trial's stages and score its clustering."""
    from harness.scoring import trial_scores

    clusters = executor.clustered(trial)
    counts = executor.token_counts(trial)
    scores = trial_scores(clusters, counts, corpus.labels)
    scores["truncated_fraction"] = executor.truncated_fraction(trial)
    scores.update(executor.stage_seconds(trial))
    return scores, clusters, counts


def _log_trial(tracker, run_id: str, trial: Trial, corpus: Corpus, scores: dict[str, float],
               clusters: np.ndarray, counts: np.ndarray) -> None:
    import matplotlib.pyplot as plt

    from harness.plots import token_counts_by_cluster_figure

    with tempfile.TemporaryDirectory() as folder:
        table = Path(folder) / "assignments.parquet"
        _assignments_table(corpus, clusters, counts).to_parquet(table, index=False)
        figure = token_counts_by_cluster_figure(counts, clusters, trial.name)
        plot = Path(folder) / "token_counts_by_cluster.png"
        figure.savefig(plot)
        plt.close(figure)
        tracker.log_files(run_id, [table, plot])
    tracker.log_results(run_id, scores)


def execute_sweep(
    prepared: PreparedSweep,
    corpora: dict[str, Corpus],
    *,
    results_dir: Path,
    tracking_uri: str,
    cache_dir: Optional[Path] = None,
    resume: bool = True,
    progress: Optional[ProgressFactory] = None,
    encode_progress=None,
) -> SweepResult:
    """Run every trial not already FINISHED in the experiment, logging each as a nested run under one sweep run."""
    from harness.cache import StageCache
    from harness.stages import StageExecutor
    from harness.tracking import SweepTracker

    sweep = prepared.sweep
    tracker = SweepTracker(tracking_uri, results_dir / "artifacts", sweep.name)
    killed = tracker.mark_orphans_killed()
    done = tracker.finished_trials() if resume else {}
    results: list[TrialResult] = [
        TrialResult(t, "REUSED", {k: v for k, v in done[t.key].data.metrics.items()}, run_id=done[t.key].info.run_id)
        for t in prepared.trials if t.key in done
    ]
    pending = [t for t in prepared.trials if t.key not in done]
    grid = sweep.grid.as_params()
    parent = tracker.start_sweep(
        sweep.name,
        params={"n_trials": len(prepared.trials), "rank_by": sweep.rank_by, **{f"grid.{k}": v for k, v in grid.items()}},
        tags={"harness.version": __version__, "harness.sweep_sha256": _file_sha256(prepared.path),
              "harness.question": sweep.question, "harness.reused_trials": str(len(results)),
              "harness.orphans_marked_killed": str(killed)},
    )
    executor = StageExecutor(corpora, pending, StageCache(cache_dir) if cache_dir else None, encode_progress)
    cards = dataset_cards(corpora, next(iter(prepared.models.values())))
    params = aligned_params(prepared.trials)
    trials = progress(pending, desc="trials", unit="trial") if progress else pending
    current: Optional[str] = None
    try:
        tracker.log_text(parent, prepared.path.read_text(), "sweep.yaml")
        tracker.log_text(parent, json.dumps(cards, indent=2), "dataset_cards.json")
        for trial in trials:
            corpus = corpora[trial.dataset]
            tags = {
                "harness.dataset_fingerprint": corpus.fingerprint,
                "harness.model_source": trial.resolved_model.source,
                "harness.model_weights_sha256": trial.resolved_model.weights_digest,
            }
            if trial.equivalent_to:
                tags["harness.equivalent_to"] = trial.equivalent_to
            current = tracker.start_trial(trial.name, trial.key, params[trial.key], tags=tags)
            tracker.log_dataset(current, corpus.name, corpus.fingerprint, _source_type(corpus), corpus.source,
                                {"rows": corpus.n_texts, "classes": corpus.n_classes})
            try:
                scores, clusters, counts = run_trial(executor, trial, corpus)
                _log_trial(tracker, current, trial, corpus, scores, clusters, counts)
                tracker.end(current, "FINISHED")
                results.append(TrialResult(trial, "FINISHED", scores, run_id=current))
            except (KeyboardInterrupt, SystemExit):
                raise
            except Exception as err:
                message = f"{type(err).__name__}: {err}".splitlines()[0]
                tracker.log_results(current, {}, tags={"harness.traceback": traceback.format_exc()[-4000:]})
                tracker.end(current, "FAILED", error=message)
                results.append(TrialResult(trial, "FAILED", error=message, run_id=current))
            current = None
        from harness.leaderboard import table as leaderboard_table

        tracker.log_text(parent, leaderboard_table(_leaderboard(results, sweep.rank_by), sweep.rank_by), "leaderboard.txt")
        tracker.log_results(parent, {"n_finished": sum(r.status == "FINISHED" for r in results),
                                     "n_reused": sum(r.status == "REUSED" for r in results),
                                     "n_failed": sum(r.status == "FAILED" for r in results),
                                     **{f"work.{k}": v for k, v in executor.work.items()}})
        tracker.end(parent, "FAILED" if any(r.status == "FAILED" for r in results) else "FINISHED")
    except BaseException:
        if current is not None:
            tracker.end(current, "KILLED")
        tracker.end(parent, "KILLED")
        raise
    return SweepResult(parent_run_id=parent, tracking_uri=tracking_uri, results=results, work=dict(executor.work),
                       rank_by=sweep.rank_by)


def run_sweep_file(path: str | Path, results_dir: Path, tracking_uri: str | None = None, *,
                   cache_dir: Optional[Path] = None, use_cache: bool = True, resume: bool = True,
                   progress: Optional[ProgressFactory] = None, encode_progress=None) -> SweepResult:
    """Everything ``harness run`` does, minus printing. The cache defaults to RESULTS_DIR/cache."""
    from harness.tracking import default_tracking_uri

    prepared = prepared_sweep(path)
    corpora = loaded_corpora(prepared)
    check_against_data(prepared, corpora)
    results_dir.mkdir(parents=True, exist_ok=True)
    return execute_sweep(
        prepared, corpora, results_dir=results_dir, tracking_uri=tracking_uri or default_tracking_uri(results_dir),
        cache_dir=(cache_dir or results_dir / "cache") if use_cache else None, resume=resume,
        progress=progress, encode_progress=encode_progress,
    )
