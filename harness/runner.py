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
from typing import TYPE_CHECKING, Any, Callable, Optional

import numpy as np

from harness import __version__
from harness._crashpoints import crash_point
from harness.cluster import clustering_limits
from harness.datasets import Corpus, dataset_name, loaded_corpus, needs_tokenizer
from harness.errors import HarnessError
from harness.layers import layer_choice_fits, output_width
from harness.models import ResolvedModel, model_device, resolve_family_model
from harness.plan import Trial, aligned_params, dataset_key, planned_trials
from harness.reduce import reduction_limits
from harness.transforms import chain_width, transform_limits
from harness.sweep import (
    LABEL_FREE_METRICS, LABELLED_METRICS, TRANSFORMER_FAMILIES, EvidenceSettings, Sweep, load_sweep, sweep_error_at,
)

if TYPE_CHECKING:
    from harness.leaderboard import Ranking

ProgressFactory = Callable[..., Any]


@dataclass
class PreparedSweep:
    """A parsed sweep with its models resolved, its data loaded and its trials planned (keyed by the data's content)."""

    path: Path
    sweep: Sweep
    models: dict[str, ResolvedModel]
    dataset_keys: dict[str, str]
    trials: list[Trial]
    corpora: dict[str, Corpus] = field(default_factory=dict, repr=False)
    # Per dataset that balances lengths by a tokenizer: the model whose tokenizer measures them (None: words).
    length_tokenizers: dict[str, Optional[ResolvedModel]] = field(default_factory=dict)


@dataclass
class TrialResult:
    trial: Trial
    status: str
    scores: dict[str, float] = field(default_factory=dict)
    error: Optional[str] = None
    run_id: Optional[str] = None
    clusters: Optional[np.ndarray] = field(default=None, repr=False)  # the labels every figure of the run is from


@dataclass
class ConfigurationResult:
    """A configuration (a trial without its seed) with its seeds' results and the evidence over them."""

    trials: list[Trial]
    seeds: list[TrialResult]
    metrics: dict[str, float] = field(default_factory=dict)
    distributions: dict[str, np.ndarray] = field(default_factory=dict, repr=False)
    tags: dict[str, str] = field(default_factory=dict)
    run_id: Optional[str] = None
    descriptions: list[dict] = field(default_factory=list, repr=False)

    @property
    def name(self) -> str:
        return self.trials[0].config_name

    @property
    def dataset(self) -> str:
        return self.trials[0].dataset

    @property
    def complete(self) -> bool:
        return all(r.status in ("FINISHED", "REUSED") for r in self.seeds)


@dataclass
class SweepResult:
    parent_run_id: str
    tracking_uri: str
    results: list[TrialResult]
    work: dict[str, int]
    rankings: dict[str, "Ranking"]
    configurations: list[ConfigurationResult] = field(default_factory=list)
    stage_log: list[dict[str, Any]] = field(default_factory=list)

    @property
    def failed(self) -> list[TrialResult]:
        return [r for r in self.results if r.status == "FAILED"]


def prepared_sweep(path: str | Path) -> PreparedSweep:
    """Parse the sweep, resolve its models, load its data and plan its trials.

    The data are loaded here because every stage key starts from the dataset's content
    (``dataset_key``): a key made before the data are read could not see a changed file,
    mirror or route.
    """
    path = Path(path)
    sweep = load_sweep(path)
    models = {}
    for index, spec in enumerate(sweep.models):
        try:
            device = model_device(spec)
        except HarnessError as err:
            raise sweep_error_at(path, ["models", index, "device"], str(err)) from None
        try:
            models[spec.label] = resolve_family_model(spec, device)
        except HarnessError as err:
            key = "vectors" if spec.family == "precomputed" else "name"
            raise sweep_error_at(path, ["models", index, key], str(err)) from None
    tokenizers = {dataset_name(spec): _length_tokenizer(path, index, spec, sweep, models)
                  for index, spec in enumerate(sweep.datasets) if needs_tokenizer(spec)}
    corpora = _loaded(path, sweep, tokenizers)
    keys = {name: dataset_key(corpus) for name, corpus in corpora.items()}
    return PreparedSweep(path=path, sweep=sweep, models=models, dataset_keys=keys,
                         trials=planned_trials(sweep, keys, models), corpora=corpora, length_tokenizers=tokenizers)


WORD_COUNTS = "words"  # length_tokenizer: balance by word counts
SUBWORD_FAMILIES = ("sentence_transformer", "transformer")


def _length_tokenizer(path: Path, index: int, spec, sweep: Sweep, models: dict[str, ResolvedModel]) -> Optional[ResolvedModel]:
    """The model whose tokenizer measures lengths for a dataset that balances them (None: word counts):
    the entry's ``length_tokenizer``, else the sweep's first model when it has a subword tokenizer."""
    from harness.models import resolve_model

    chosen = spec.length_tokenizer
    if chosen is None:
        first = models[sweep.models[0].label]
        return first if first.family in SUBWORD_FAMILIES else None
    if chosen == WORD_COUNTS:
        return None
    try:
        resolved = resolve_model(chosen)
        _ = resolved.config  # refuses a folder without config.json: no transformer, so no tokenizer to count with
    except HarnessError as err:
        raise sweep_error_at(path, ["datasets", index, "length_tokenizer"], str(err)) from None
    return resolved


def length_tokenizer_setting(prepared: PreparedSweep, dataset: str) -> Optional[str]:
    """What a one-model sweep must write as the dataset's ``length_tokenizer`` to balance exactly as this sweep
    did (None where the dataset does not balance by a tokenizer): the model's name, or its folder when the
    name alone would not find the same revision, or "words"."""
    if dataset not in prepared.length_tokenizers:
        return None
    spec = next(s for s in prepared.sweep.datasets if dataset_name(s) == dataset)
    if spec.length_tokenizer is not None:
        return spec.length_tokenizer
    model = prepared.length_tokenizers[dataset]
    if model is None:
        return WORD_COUNTS
    first = prepared.sweep.models[0]
    return str(model.folder) if first.revision is not None else model.name


def _loaded(path: Path, sweep: Sweep, tokenizers: dict[str, Optional[ResolvedModel]]) -> dict[str, Corpus]:
    """Load every dataset; a data problem is reported at the sweep entry that names the data.

    Sources that balance lengths measure them with the tokenizer their entry names (``length_tokenizer``),
    by default the sweep's first model's.
    """
    corpora, counters = {}, {}
    for index, spec in enumerate(sweep.datasets):
        measure = tokenizers.get(dataset_name(spec))
        if measure is not None and measure.folder not in counters:
            from harness.datasets.card import tokenizer_counter  # imports scikit-learn: only when lengths are balanced

            counters[measure.folder] = tokenizer_counter(measure.folder)
        count_tokens = counters[measure.folder] if measure is not None else None
        try:
            corpora[dataset_name(spec)] = loaded_corpus(spec, count_tokens)
        except HarnessError as err:
            raise sweep_error_at(path, ["datasets", index], str(err)) from None
    return corpora


def loaded_corpora(prepared: PreparedSweep) -> dict[str, Corpus]:
    """The sweep's corpora, as loaded (once) when it was prepared."""
    return prepared.corpora


def check_against_data(prepared: PreparedSweep, corpora: dict[str, Corpus]) -> None:
    """Refuse settings that cannot run on these corpora and models, naming the sweep key."""
    grid = prepared.sweep.grid
    for corpus in corpora.values():
        for m_index, spec in enumerate(prepared.sweep.models):
            model = prepared.models[spec.label]
            if spec.family == "precomputed":
                from harness.precomputed import aligned_vectors, vectors_source

                try:
                    aligned_vectors(vectors_source(spec), corpus.ids, corpus.name)
                except HarnessError as err:
                    raise sweep_error_at(prepared.path, ["models", m_index, "vectors"], str(err)) from None
            for index, layers in enumerate(grid.layers if spec.family in TRANSFORMER_FAMILIES else ()):
                if not layer_choice_fits(layers, model.n_hidden_states):
                    raise sweep_error_at(prepared.path, ["grid", "layers", index],
                        f"{layers!r} does not fit '{spec.name}', which has {model.n_hidden_states} hidden states "
                        f"(embeddings + {model.n_hidden_states - 1} layers)")
            widths = ({output_width(layers, model.width) for layers in grid.layers}
                      if spec.family in TRANSFORMER_FAMILIES else {model.width})
            # Transforms see the pooled widths; reducers also see what whitening leaves.
            for axis, limits, axis_widths in (
                ("transform", transform_limits, widths),
                ("reduce", reduction_limits, widths | {chain_width(c, w) for c in grid.transform for w in widths}),
            ):
                for index, setting in enumerate(getattr(grid, axis)):
                    problem = next((p for w in sorted(axis_widths) if (p := limits(setting, corpus.n_texts, w))), None)
                    if problem:
                        raise sweep_error_at(prepared.path, ["grid", axis, index],
                                             f"{problem} (dataset '{corpus.name}', model '{spec.name}')")
        metric = prepared.sweep.rank_by
        if corpus.labels is None and metric in LABELLED_METRICS:
            raise sweep_error_at(prepared.path, ["rank_by"], f"'{metric}' needs gold labels, and dataset '{corpus.name}' has "
                                 f"none; use one of {', '.join(LABEL_FREE_METRICS)} (or leave rank_by out)")
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


def dataset_cards(corpora: dict[str, Corpus], models: dict[str, ResolvedModel]) -> dict[str, dict]:
    """The card of each loaded corpus, lengths measured with the tokenizer of the sweep's first transformer model
    (or in words where the sweep has none)."""
    from harness.datasets.card import corpus_card, tokenizer_counter
    from harness.static_vectors import tokens

    transformer = next((m for m in models.values() if m.family in ("sentence_transformer", "transformer")), None)
    if transformer is not None:
        count, measure = tokenizer_counter(transformer.folder), transformer.name
    else:
        count, measure = (lambda texts: np.array([len(tokens(t)) for t in texts])), "words"
    return {name: {**corpus_card(corpus, count), "length_tokenizer": measure} for name, corpus in corpora.items()}


def _file_sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def run_trial(executor, trial: Trial, corpus: Corpus, evidence: EvidenceSettings,
              scored: Optional[dict] = None) -> tuple[dict[str, float], list[dict], np.ndarray, np.ndarray]:
    """Compute (or reuse) the trial's stages; score and describe its clustering. ``scored`` holds, by trial key,
    scores and tables computed on a cluster (``distributed_scores``), or the error computing them raised."""
    from harness.scoring import described_clusters, label_free_scores, trial_scores

    clusters = executor.clustered(trial)
    counts = executor.token_counts(trial)
    if scored is not None and trial.key in scored:
        found = scored[trial.key]
        if isinstance(found, BaseException):
            raise found.with_traceback(None)
        scores, table = dict(found[0]), found[1]
    else:
        scores = trial_scores(clusters, counts, corpus.labels)
        # Figures of the trial's own vectors come from its own pooling, also where its clusters are computed from another.
        scores.update(label_free_scores(clusters, counts, executor.pooled(trial, own=True), executor.reduced(trial),
                                        seed=trial.seed, permutations=evidence.permutations, max_points=evidence.max_points))
        scores["length_leakage_r2"] = executor.length_leakage(trial, "transform")
        scores["length_leakage_r2_pooled"] = executor.length_leakage(trial, "pool")
        table, scores["npmi_mean"] = described_clusters(executor.term_counts(trial), clusters, counts, top=evidence.top_terms)
    if trial.model.family != "precomputed":  # unknown for vectors made elsewhere
        scores.update(executor.long_text_info(trial))
    if trial.model.family == "static":
        scores["oov_fraction"] = executor.encode_info(trial).get("oov_fraction", float("nan"))
    scores.update(executor.stage_seconds(trial))
    return scores, table, clusters, counts


def _log_trial(tracker, run_id: str, trial: Trial, corpus: Corpus, scores: dict[str, float], table: list[dict],
               clusters: np.ndarray, counts: np.ndarray) -> None:
    import matplotlib.pyplot as plt
    import pandas as pd

    from harness.plots import token_counts_by_cluster_figure

    with tempfile.TemporaryDirectory() as folder:
        assignments = Path(folder) / "assignments.parquet"
        _assignments_table(corpus, clusters, counts).to_parquet(assignments, index=False)
        descriptions = Path(folder) / "clusters.parquet"
        pd.DataFrame(table, columns=["cluster", "size", "median_tokens", "top_terms", "npmi"]).to_parquet(descriptions, index=False)
        figure = token_counts_by_cluster_figure(counts, clusters, trial.name)
        plot = Path(folder) / "token_counts_by_cluster.png"
        figure.savefig(plot)
        plt.close(figure)
        tracker.log_files(run_id, [assignments, descriptions, plot])
    crash_point("mlflow_write")
    tracker.log_results(run_id, scores)


def _trial_tags(trial: Trial, corpus: Corpus) -> dict[str, str]:
    tags = {
        "harness.dataset_fingerprint": corpus.fingerprint,
        "harness.model_source": trial.resolved_model.source,
        "harness.model_weights_sha256": trial.resolved_model.weights_digest,
        "harness.device": trial.resolved_model.device.label,
        "harness.config_key": trial.config_key,
    }
    if trial.equivalent_to:
        tags["harness.equivalent_to"] = trial.equivalent_to
    return tags


def _run_configuration(tracker, executor, configuration: list[Trial], done: dict, corpus: Corpus, params: dict,
                       evidence: EvidenceSettings, parent: str, on_trial, scored: Optional[dict] = None,
                       configuration_evidence: Optional[Callable] = None) -> ConfigurationResult:
    """The seed runs of one configuration under one configuration run, then the evidence over seeds (with
    ``scored`` and ``configuration_evidence`` from a cluster where the sweep runs on one)."""
    from harness.evidence import configuration_evidence as evidence_here, seed_free

    configuration_evidence = configuration_evidence or evidence_here
    first = configuration[0]
    config_params = {k: v for k, v in params[first.key].items() if k != "seed"}
    config_run = tracker.start_run(first.config_name, parent, "configuration", config_params, _trial_tags(first, corpus))
    result = ConfigurationResult(trials=configuration, seeds=[], run_id=config_run)
    current: Optional[str] = None
    try:
        for trial in configuration:
            if trial.key in done:
                run, clusters = done[trial.key]
                result.seeds.append(TrialResult(trial, "REUSED", dict(run.data.metrics), run_id=run.info.run_id,
                                                clusters=clusters))
                continue
            current = tracker.start_run(trial.name, config_run, "trial", params[trial.key], _trial_tags(trial, corpus),
                                        trial_key=trial.key)
            tracker.log_dataset(current, corpus.name, corpus.fingerprint, _source_type(corpus), corpus.source,
                                {"rows": corpus.n_texts, "classes": corpus.n_classes})
            try:
                scores, table, clusters, counts = run_trial(executor, trial, corpus, evidence, scored)
                _log_trial(tracker, current, trial, corpus, scores, table, clusters, counts)
                tracker.end(current, "FINISHED")
                result.seeds.append(TrialResult(trial, "FINISHED", scores, run_id=current, clusters=clusters))
                crash_point("between_trials")
                if not result.descriptions:
                    result.descriptions = table
            except (KeyboardInterrupt, SystemExit):
                raise
            except Exception as err:
                message = f"{type(err).__name__}: {err}".splitlines()[0]
                tracker.log_results(current, {}, tags={"harness.traceback": traceback.format_exc()[-4000:],
                                                       "harness.error_type": type(err).__name__,
                                                       "harness.error_message": str(err).splitlines()[0] if str(err) else ""})
                tracker.end(current, "FAILED", error=message)
                result.seeds.append(TrialResult(trial, "FAILED", error=message, run_id=current))
            current = None
            on_trial()
        if result.complete:
            # Means, intervals and stability from the same labels: each seed's own (a reused seed's from its run's
            # assignments.parquet, which its logged scores were computed from), never a recomputation.
            found = configuration_evidence([r.scores for r in result.seeds], [r.clusters for r in result.seeds],
                                           corpus.labels, resamples=evidence.resamples, seed=evidence.seed,
                                           level=evidence.level, seed_free=seed_free(first.reducer, first.clusterer))
            result.metrics, result.distributions, result.tags = found.metrics(), found.distributions, found.tags()
            tracker.log_results(config_run, result.metrics, tags=result.tags)
            tracker.end(config_run, "FINISHED")
        else:
            tracker.end(config_run, "FAILED", error="a seed run failed")
    except BaseException:
        if current is not None:
            tracker.end(current, "KILLED")
        tracker.end(config_run, "KILLED")
        raise
    return result


def _reusable_runs(tracker, trials: list[Trial], corpora: dict[str, Corpus]) -> dict[str, tuple[Any, np.ndarray]]:
    """FINISHED runs of these trials with the cluster labels of their own assignments.parquet, by trial key.

    A run whose assignments are missing, or do not list this corpus's texts in order, is not reused: its
    trial runs again rather than mixing its logged scores with labels from elsewhere.
    """
    finished = tracker.finished_trials()
    reusable = {}
    for trial in trials:
        run = finished.get(trial.key)
        if run is None:
            continue
        table = tracker.run_table(run.info.run_id, "assignments.parquet")
        ids = corpora[trial.dataset].ids
        if table is not None and len(table) == len(ids) and np.array_equal(table["id"].astype(str).to_numpy(),
                                                                           np.asarray(ids).astype(str)):
            reusable[trial.key] = (run, table["cluster"].to_numpy(np.int64))
    return reusable


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
    dask_client=None,
    chunk_texts: Optional[int] = None,
) -> SweepResult:
    """Run every trial not already FINISHED in the experiment: sweep run -> configuration runs -> seed runs.

    With a Dask client, the forward passes, reductions, clusterings and scores are computed on its cluster
    first, and each configuration's evidence there as it completes; MLflow is written from here only.
    """
    from harness.cache import StageCache
    from harness.leaderboard import rank_configurations, ranking_metric, table as leaderboard_table
    from harness.plan import configurations
    from harness.stages import StageExecutor
    from harness.tracking import SweepTracker

    sweep = prepared.sweep
    tracker = SweepTracker(tracking_uri, results_dir / "artifacts", sweep.name)
    killed = tracker.mark_orphans_killed()
    done = _reusable_runs(tracker, prepared.trials, corpora) if resume else {}
    pending = [t for t in prepared.trials if t.key not in done]
    grid = sweep.grid.as_params()
    parent = tracker.start_run(sweep.name, None, "sweep",
        {"n_trials": len(prepared.trials), "rank_by": sweep.rank_by or "default", **{f"grid.{k}": v for k, v in grid.items()},
         **{f"evidence.{k}": v for k, v in sweep.evidence.as_params().items()}},
        {"harness.version": __version__, "harness.sweep_sha256": _file_sha256(prepared.path),
         "harness.sweep_path": str(prepared.path.resolve()), "harness.results_dir": str(results_dir.resolve()),
         "harness.cache_dir": str(cache_dir.resolve()) if cache_dir else "",
         "harness.question": sweep.question, "harness.reused_trials": str(len(prepared.trials) - len(pending)),
         "harness.orphans_marked_killed": str(killed)})
    tracker.show_ranking(parent, sorted({ranking_metric(sweep.rank_by, c.labels is not None) for c in corpora.values()}))
    executor = StageExecutor(corpora, prepared.trials, StageCache(cache_dir) if cache_dir else None, encode_progress)
    params = aligned_params(prepared.trials)
    bar = progress(total=len(pending), desc="trials", unit="trial") if progress else None
    results: list[ConfigurationResult] = []
    scored, evidence_of = None, None
    try:
        if dask_client is not None:
            from harness.distributed import precompute_on_cluster
            from harness.distributed_encode import encode_on_cluster
            from harness.distributed_scores import evidence_on_cluster, score_on_cluster

            # Inside the try: whatever the cluster does, the sweep run is closed, never left RUNNING.
            encode_on_cluster(executor, pending, dask_client, **({"chunk_size": chunk_texts} if chunk_texts else {}))
            precompute_on_cluster(executor, pending, dask_client)
            scored = score_on_cluster(executor, pending, sweep.evidence, dask_client)
            evidence_of = evidence_on_cluster(dask_client)
        tracker.log_text(parent, prepared.path.read_text(), "sweep.yaml")
        tracker.log_text(parent, json.dumps(dataset_cards(corpora, prepared.models), indent=2), "dataset_cards.json")
        for configuration in configurations(prepared.trials):
            results.append(_run_configuration(tracker, executor, configuration, done, corpora[configuration[0].dataset],
                                              params, sweep.evidence, parent, bar.update if bar else (lambda: None),
                                              scored, evidence_of))
        rankings = rank_configurations(results, sweep, corpora)
        for ranking in rankings.values():
            for row in ranking.rows:
                tracker.log_results(row.configuration.run_id, {"rank": row.rank, "tied_with_leader": float(row.tied)}
                                    if row.tied is not None else {"rank": row.rank}, tags=ranking.tags)
        tracker.log_text(parent, "\n\n".join(leaderboard_table(r) for r in rankings.values()), "leaderboard.txt")
        trial_results = [r for c in results for r in c.seeds]
        tracker.log_results(parent, {"n_finished": sum(r.status == "FINISHED" for r in trial_results),
                                     "n_reused": sum(r.status == "REUSED" for r in trial_results),
                                     "n_failed": sum(r.status == "FAILED" for r in trial_results),
                                     **{f"work.{k}": v for k, v in executor.work.items()}})
        tracker.end(parent, "FAILED" if any(r.status == "FAILED" for r in trial_results) else "FINISHED")
    except BaseException:
        tracker.end(parent, "KILLED")
        raise
    finally:
        if bar is not None:
            bar.close()
    return SweepResult(parent_run_id=parent, tracking_uri=tracking_uri, results=trial_results, work=dict(executor.work),
                       rankings=rankings, configurations=results, stage_log=executor.stage_log)


def run_sweep_file(path: str | Path, results_dir: Path, tracking_uri: str | None = None, *,
                   cache_dir: Optional[Path] = None, use_cache: bool = True, resume: bool = True,
                   progress: Optional[ProgressFactory] = None, encode_progress=None,
                   executor: str = "local", scheduler: Optional[str] = None,
                   chunk_texts: Optional[int] = None) -> SweepResult:
    """Everything ``harness run`` does, minus printing. The cache defaults to RESULTS_DIR/cache. ``chunk_texts``:
    texts per encode task on a cluster (default ``distributed_encode.CHUNK_TEXTS``)."""
    from harness.tracking import default_tracking_uri

    from harness.tracking import check_reachable

    prepared = prepared_sweep(path)
    corpora = loaded_corpora(prepared)
    check_against_data(prepared, corpora)
    if tracking_uri:
        check_reachable(tracking_uri)  # before anything is written
    results_dir.mkdir(parents=True, exist_ok=True)
    client = None
    if executor == "dask":
        from harness.distributed import dask_client

        client = dask_client(scheduler)
    try:
        return execute_sweep(
            prepared, corpora, results_dir=results_dir, tracking_uri=tracking_uri or default_tracking_uri(results_dir),
            cache_dir=(cache_dir or results_dir / "cache") if use_cache else None, resume=resume,
            progress=progress, encode_progress=encode_progress, dask_client=client, chunk_texts=chunk_texts,
        )
    finally:
        if client is not None:
            cluster = getattr(client, "cluster_to_close", None)
            client.close()
            if cluster is not None:
                cluster.close()
