"""Running a sweep: load, check against the data, then compute, score and log every trial.

Nothing is written (no MLflow run, no file) until the sweep and its data have
passed every check; after that, a trial that raises becomes a FAILED run and the
sweep goes on.
"""

from __future__ import annotations

import json
import tempfile
import traceback
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable, Optional

import numpy as np

from harness import __version__
from harness.keys import file_sha256
from harness._crashpoints import crash_point
from harness.datasets import Corpus, dataset_name, loaded_corpus, needs_tokenizer
from harness.embed.layers import layer_choice_fits, output_width
from harness.embed.models import ResolvedModel, model_device, resolve_family_model
from harness.engine.plan import SINGLE_VECTOR_FAMILIES, Trial, aligned_params, dataset_key, planned_trials
from harness.errors import HarnessError
from harness.geometry.cluster import clustering_limits
from harness.geometry.reduce import reduction_limits
from harness.geometry.transforms import chain_width, transform_limits
from harness.sweep import (
    LABEL_FREE_METRICS, LABELLED_METRICS, TRANSFORMER_FAMILIES, EvidenceSettings, Sweep, load_sweep, sweep_error_at,
)

if TYPE_CHECKING:
    from harness.score.leaderboard import Ranking

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
    across: Optional[dict] = None  # the across-corpus verdict (two or more datasets), as logged

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
                         trials=planned_trials(sweep, keys, models, {name: c.n_texts for name, c in corpora.items()}), corpora=corpora, length_tokenizers=tokenizers)


WORD_COUNTS = "words"  # length_tokenizer: balance by word counts
SUBWORD_FAMILIES = ("sentence_transformer", "transformer")


def _length_tokenizer(path: Path, index: int, spec, sweep: Sweep, models: dict[str, ResolvedModel]) -> Optional[ResolvedModel]:
    """The model whose tokenizer measures lengths for a dataset that balances them (None: word counts):
    the entry's ``length_tokenizer``, else the sweep's first model when it has a subword tokenizer."""
    from harness.embed.models import resolve_model

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


def configuration_settings(prepared: PreparedSweep, configuration: list[Trial]) -> dict[str, Any]:
    """Everything a one-configuration sweep needs to run this configuration again, as resolved for this run (paths
    absolute, the tokenizer a balanced dataset was measured with named): logged with the configuration run, so
    that a citation needs neither the sweep file nor its data. ``rank_by`` is None where the sweep left the default."""
    trial = configuration[0]
    dataset = next(spec for spec in prepared.sweep.datasets if dataset_name(spec) == trial.dataset)
    entry = {k: v for k, v in dataset.as_params().items() if v is not None}
    tokenizer = length_tokenizer_setting(prepared, trial.dataset)
    if tokenizer is not None:
        entry["length_tokenizer"] = tokenizer
    # A family with one vector per text (lexical, precomputed) plans its own pooling name (tfidf_svd, precomputed)
    # for any pooling of the grid, and the grid accepts only registered poolings: name one the sweep itself gave.
    single = trial.model.family in SINGLE_VECTOR_FAMILIES
    pooling = prepared.sweep.grid.pooling[0] if single else trial.pooling
    return {
        "datasets": [entry],
        "models": [{"name": trial.model.name, **trial.model.model_dump(mode="json", exclude_defaults=True)}],
        "grid": {
            "pooling": [pooling],
            "layers": [trial.layers],
            "transform": [[step.as_params() for step in trial.transform]],
            "normalize": [trial.normalize],
            "reduce": [trial.reducer.as_params()],
            "cluster": [trial.clusterer.as_params()],
            "seeds": sorted({t.seed for t in configuration}),
        },
        "rank_by": prepared.sweep.rank_by,
        "evidence": prepared.sweep.evidence.as_params(),
        "storage_dtype": prepared.sweep.storage_dtype,
    }


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
    """Refuse settings that cannot run on these corpora and models, naming the sweep key; a halving search
    also on its first round's subsamples, which are the smallest corpora it runs on."""
    _check_grid_against(prepared, corpora)
    search = prepared.sweep.search
    if search.strategy != "halving":
        return
    from harness.engine.halving import nested_order, round_rows, subcorpus

    smallest = min(corpora.values(), key=lambda c: c.n_texts)
    if search.start_texts >= smallest.n_texts:
        raise sweep_error_at(prepared.path, ["search", "start_texts"],
                             f"{search.start_texts} is not fewer than the {smallest.n_texts} texts of dataset "
                             f"'{smallest.name}'; expected a first round smaller than every dataset")
    first = {name: subcorpus(c, round_rows(nested_order(c.labels, c.n_texts, search.seed), search.start_texts))
             for name, c in corpora.items()}
    try:
        _check_grid_against(prepared, first)
    except HarnessError as err:
        raise sweep_error_at(prepared.path, ["search", "start_texts"],
                             f"{search.start_texts} texts are too few for the grid's first round: "
                             f"{str(err).split(': ', 1)[-1]}") from None


def _check_grid_against(prepared: PreparedSweep, corpora: dict[str, Corpus]) -> None:
    grid = prepared.sweep.grid
    for corpus in corpora.values():
        for m_index, spec in enumerate(prepared.sweep.models):
            model = prepared.models[spec.label]
            if spec.family == "precomputed":
                from harness.embed.precomputed import aligned_vectors, vectors_source

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
    from harness.embed.static_vectors import tokens

    transformer = next((m for m in models.values() if m.family in ("sentence_transformer", "transformer")), None)
    if transformer is not None:
        count, measure = tokenizer_counter(transformer.folder), transformer.name
    else:
        count, measure = (lambda texts: np.array([len(tokens(t)) for t in texts])), "words"
    return {name: {**corpus_card(corpus, count), "length_tokenizer": measure} for name, corpus in corpora.items()}


def run_trial(executor, trial: Trial, corpus: Corpus, evidence: EvidenceSettings, scored: Optional[dict] = None
              ) -> tuple[dict[str, float], list[dict], np.ndarray, np.ndarray, dict[str, str]]:
    """Compute (or reuse) the trial's stages; score and describe its clustering. ``scored`` holds, by trial key,
    scores and tables computed on a cluster (``distributed_scores``), or the error computing them raised. The last
    item: tags saying why a score is NaN."""
    from harness.score.scoring import described_clusters, label_free_notes, label_free_scores, trial_scores

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
        vector_scores = {name: executor.label_free_score(trial, name, clusters, max_points=evidence.max_points)
                         for name in ("silhouette", "dbcv")}
        scores.update(label_free_scores(clusters, counts, vector_scores, seed=trial.seed, permutations=evidence.permutations))
        scores["length_leakage_r2"] = executor.length_leakage(trial, "transform")
        scores["length_leakage_r2_pooled"] = executor.length_leakage(trial, "pool")
        table, scores["npmi_mean"] = described_clusters(executor.term_counts(trial), clusters, counts, top=evidence.top_terms)
    notes = label_free_notes(scores, clusters, executor.reduced(trial), seed=trial.seed, max_points=evidence.max_points)
    if trial.model.family != "precomputed":  # unknown for vectors made elsewhere
        scores.update(executor.long_text_info(trial))
    if trial.model.family == "static":
        scores["oov_fraction"] = executor.encode_info(trial).get("oov_fraction", float("nan"))
    scores.update(executor.stage_seconds(trial))
    return scores, table, clusters, counts, notes


def _log_trial(tracker, run_id: str, trial: Trial, corpus: Corpus, scores: dict[str, float], table: list[dict],
               clusters: np.ndarray, counts: np.ndarray, notes: dict[str, str]) -> None:
    """A seed run's two tables in one artifact upload, then its scores and notes in one batch. No figure: the
    report draws token counts by cluster from assignments.parquet, and a per-seed image was never opened."""
    import pandas as pd

    with tempfile.TemporaryDirectory() as folder:
        _assignments_table(corpus, clusters, counts).to_parquet(Path(folder) / "assignments.parquet", index=False)
        pd.DataFrame(table, columns=["cluster", "size", "median_tokens", "top_terms", "npmi"]).to_parquet(
            Path(folder) / "clusters.parquet", index=False)
        tracker.log_folder(run_id, Path(folder))
    crash_point("mlflow_write", before=tracker.flush)  # killed once the artifacts are in the store
    tracker.log_results(run_id, scores, tags=notes or None)


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
                       evidence: EvidenceSettings, parent: str, on_trial, settings: Optional[dict[str, Any]], *,
                       kind: str = "configuration", extra_params: Optional[dict] = None,
                       extra_tags: Optional[dict] = None, scored: Optional[dict] = None,
                       configuration_evidence: Optional[Callable] = None) -> ConfigurationResult:
    """The seed runs of one configuration under one configuration run, then the evidence over seeds (with
    ``scored`` and ``configuration_evidence`` from a cluster where the sweep runs on one).
    ``kind`` "round": an early round of a halving search (a subsample), which the leaderboard does not read and
    which logs no ``settings`` (a citation reruns a configuration on the whole corpus, never on a round's sample)."""
    from harness.score.evidence import configuration_evidence as evidence_here, seed_free
    from harness.track.tracking import CONFIGURATION_ARTIFACT

    configuration_evidence = configuration_evidence or evidence_here
    first = configuration[0]
    config_params = {**{k: v for k, v in params[first.key].items() if k != "seed"}, **(extra_params or {})}
    config_run = tracker.start_run(first.config_name, parent, kind, config_params,
                                   {**_trial_tags(first, corpus), **(extra_tags or {})})
    result = ConfigurationResult(trials=configuration, seeds=[], run_id=config_run)
    current: Optional[str] = None
    try:
        if settings is not None:
            tracker.log_text(config_run, json.dumps(settings, indent=2), CONFIGURATION_ARTIFACT)
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
                scores, table, clusters, counts, notes = run_trial(executor, trial, corpus, evidence, scored)
                _log_trial(tracker, current, trial, corpus, scores, table, clusters, counts, notes)
                tracker.end(current, "FINISHED")
                result.seeds.append(TrialResult(trial, "FINISHED", scores, run_id=current, clusters=clusters))
                crash_point("between_trials", before=tracker.flush)  # killed once the trial is FINISHED in the store
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


def _log_winner_map(tracker, executor, ranking: "Ranking", corpus: Corpus, evidence: EvidenceSettings,
                    wanted: bool) -> None:
    """Compute the 2-D map of the dataset's winner from its first seed and log it with the winner's configuration
    run, so that a report needs nothing but the store. A map that cannot be computed is a tag saying why, never a
    failed run: the scores stand without it."""
    from harness.engine.winner_map import (
        MAP_INFO, MAP_LEFT_OUT, MAP_LOGGED, MAP_POINTS, MAP_TAG, map_failed, map_info, map_points,
    )
    from harness.score.describe import cluster_descriptions

    winner = ranking.winner
    if winner is None or not winner.configuration.complete or winner.value != winner.value:
        return  # no winner: the report has none to map either
    configuration = winner.configuration
    if not wanted:
        tracker.log_results(configuration.run_id, {}, tags={MAP_TAG: MAP_LEFT_OUT})
        return
    first = configuration.seeds[0]
    trial = first.trial
    try:
        counts = executor.token_counts(trial)
        xy = executor.map_coordinates(trial)
        descriptions = cluster_descriptions(executor.term_counts(trial), first.clusters, counts, top=evidence.top_terms)
        # After the map's fit: waiting here for the seed run's MLflow id lets the writer catch up meanwhile.
        seed_run_id = tracker.run_id(first.run_id) if first.run_id else ""
        info = map_info(dataset=ranking.dataset, configuration=configuration.name, seed_run_id=seed_run_id,
                        trial_key=trial.key, seed=trial.seed, n_texts=corpus.n_texts, descriptions=descriptions)
        with tempfile.TemporaryDirectory() as folder:
            points = Path(folder) / MAP_POINTS
            map_points(corpus.ids, corpus.labels, first.clusters, counts, xy).to_parquet(points, index=False)
            (Path(folder) / MAP_INFO).write_text(json.dumps(info, indent=2))
            tracker.log_files(configuration.run_id, [points, Path(folder) / MAP_INFO])
    except (KeyboardInterrupt, SystemExit):
        raise
    except Exception as err:
        tracker.log_results(configuration.run_id, {}, tags={MAP_TAG: map_failed(err)})
        return
    tracker.log_results(configuration.run_id, {}, tags={MAP_TAG: MAP_LOGGED})


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


def _log_across_verdict(tracker, parent: str, rankings: dict, params: dict, sweep_name: str) -> Optional[dict]:
    """The across-corpus verdict over the configurations every dataset ran, logged to the sweep run: its
    numbers as metrics, its best and winner as tags, the whole of it as JSON and its diagram as a PNG.
    A verdict that cannot be made (fewer than 2 shared configurations) is logged as a tag saying why."""
    from harness.score.across_corpora import (
        DIAGRAM_ARTIFACT, VERDICT_ARTIFACT, gathered_scores, run_metrics, run_tags, scored_from_rankings, verdict_of,
        verdict_payload, verdict_png,
    )

    gathered = gathered_scores(scored_from_rankings(rankings, params, sweep_name))
    try:
        verdict, note = verdict_of(gathered)
    except HarnessError as err:
        tracker.log_results(parent, {}, tags={"harness.across_skipped": str(err)})
        return None
    payload = verdict_payload(verdict, gathered, note)
    tracker.log_results(parent, run_metrics(payload), tags=run_tags(payload))
    tracker.log_text(parent, json.dumps(payload, indent=2), VERDICT_ARTIFACT)
    with tempfile.TemporaryDirectory() as folder:
        diagram = Path(folder) / DIAGRAM_ARTIFACT
        diagram.write_bytes(verdict_png(payload))
        tracker.log_files(parent, [diagram])
    return payload


HALVING_ARTIFACT = "halving.json"


def _halving_search(tracker, prepared: PreparedSweep, corpora: dict[str, Corpus], done: dict, parent: str,
                    encode_progress, resume: bool, on_trial,
                    full) -> tuple[list, list, dict, list, dict]:
    """Successive halving, per dataset: every configuration on the first nested subsample, the best 1/factor
    (and whatever ties the cut line) on to the next, up to the whole corpus. ``full``: the sweep's executor over
    the whole corpora, whose forward passes serve every round (a round's texts are rows of its corpus) and which
    runs the last round. Early rounds are logged as "round" runs (param ``round``, tag
    ``harness.round``; a configuration cut there gets ``harness.cut_at``); the last round, on the whole corpus,
    as the usual configuration runs, so the leaderboard and the verdict are on the survivors only.
    Returns (last-round results, every trial result, work, stage log, the halving log)."""
    from collections import Counter

    from harness.engine.halving import nested_order, round_rows, round_sizes, subcorpus, survivors
    from harness.engine.plan import configurations
    from harness.engine.stages import StageExecutor
    from harness.score.across_corpora import configuration_identity, configuration_label
    from harness.score.leaderboard import ranking_metric

    sweep, search = prepared.sweep, prepared.sweep.search
    final, seeds, work, stage_log, log = [], [], Counter(), [], {}
    for dataset, corpus in corpora.items():
        full_trials = [t for t in prepared.trials if t.dataset == dataset]
        full_by_identity = {configuration_identity(t.config_params): t for t in full_trials}
        sizes = round_sizes(corpus.n_texts, search.start_texts, search.factor)
        order = nested_order(corpus.labels, corpus.n_texts, search.seed)
        metric = ranking_metric(sweep.rank_by, corpus.labels is not None)
        alive: Optional[set[str]] = None
        rounds = []
        for index, size in enumerate(sizes):
            last = index == len(sizes) - 1
            rows = round_rows(order, size)
            part = corpus if last else subcorpus(corpus, rows)
            if last:
                trials = full_trials
            else:
                keys = {**prepared.dataset_keys, dataset: dataset_key(part)}  # the subsample's content keys its trials
                trials = [t for t in planned_trials(sweep, keys, prepared.models, {dataset: part.n_texts})
                          if t.dataset == dataset]
            if alive is not None:
                trials = [t for t in trials if configuration_identity(t.config_params) in alive]
            reusable = done if last else (_reusable_runs(tracker, trials, {dataset: part}) if resume else {})
            if last:
                executor = full
            else:
                # No disk cache for a round: its vectors may be rows of the whole corpus's pass (share_rows), equal
                # to the subsample's own only to float rounding, and nothing computed from them is stored under the
                # subsample's keys. A resumed round reuses its logged runs (MLflow) instead.
                executor = StageExecutor({dataset: part}, trials, None, encode_progress)
                for trial in trials:
                    if trial.key not in reusable:
                        executor.share_rows(trial, full, full_by_identity[configuration_identity(trial.config_params)], rows)
            params = aligned_params(trials)
            results = [_run_configuration(tracker, executor, group, reusable, part, params, sweep.evidence, parent, on_trial,
                                          configuration_settings(prepared, group) if last else None,
                                          kind="configuration" if last else "round",
                                          extra_params={"round": index, "round_texts": size},
                                          extra_tags={"harness.round": str(index), "harness.round_texts": str(size)})
                       for group in configurations(trials)]
            if not last:  # the whole corpus's executor is the sweep's own: its work is counted with the sweep's
                work.update(executor.work)
                stage_log += executor.stage_log
            seeds += [r for c in results for r in c.seeds]
            values = {configuration_identity(c.trials[0].config_params): _ranked_value(c, metric) for c in results}
            distributions = {configuration_identity(c.trials[0].config_params): c.distributions.get(metric) for c in results}
            kept = set(values) if last else set(survivors(values, search.factor, distributions, sweep.evidence.level))
            for c in results:
                if configuration_identity(c.trials[0].config_params) not in kept:
                    tracker.log_results(c.run_id, {}, tags={"harness.cut_at": str(index)})
            rounds.append({"round": index, "texts": size, "metric": metric, "configurations": [
                {"configuration": configuration_label(c.name), "run_id": c.run_id,
                 "value": _json_number(_ranked_value(c, metric)),
                 "kept": configuration_identity(c.trials[0].config_params) in kept} for c in results]})
            alive = kept
            if last:
                final += results
        log[dataset] = {"sizes": sizes, "factor": search.factor, "seed": search.seed, "rounds": rounds}
    return final, seeds, dict(work), stage_log, log


def _ranked_value(configuration: ConfigurationResult, metric: str) -> float:
    value = configuration.metrics.get(metric)
    return float("nan") if value is None else float(value)


def _json_number(value: float) -> Optional[float]:
    return value if np.isfinite(value) else None


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
    winner_map: bool = True,
    chunk_texts: Optional[int] = None,
) -> SweepResult:
    """Run every trial not already FINISHED in the experiment: sweep run -> configuration runs -> seed runs.

    With a Dask client, the forward passes, reductions, clusterings and scores are computed on its cluster
    first, and each configuration's evidence there as it completes; MLflow is written from here only. At the
    end, each dataset's winner gets its 2-D map, logged with its configuration run (``winner_map=False``: left
    out, and the run says so).
    """
    from harness.engine.cache import StageCache
    from harness.engine.plan import configurations
    from harness.engine.stages import StageExecutor
    from harness.score.leaderboard import rank_configurations, ranking_metric, table as leaderboard_table
    from harness.track.queued import QueuedTracker, store_reader

    sweep = prepared.sweep
    # Reads first, in this process; then every write goes through the writer process, in order.
    reader = store_reader(tracking_uri, results_dir / "artifacts", sweep.name)
    killed = reader.mark_orphans_killed() if reader is not None else 0
    done = _reusable_runs(reader, prepared.trials, corpora) if resume and reader is not None else {}
    tracker = QueuedTracker(tracking_uri, results_dir / "artifacts", sweep.name, reader)
    pending = [t for t in prepared.trials if t.key not in done]
    grid = sweep.grid.as_params()
    parent = tracker.start_run(sweep.name, None, "sweep",
        {"n_trials": len(prepared.trials), "rank_by": sweep.rank_by or "default", **{f"grid.{k}": v for k, v in grid.items()},
         **{f"evidence.{k}": v for k, v in sweep.evidence.as_params().items()}},
        {"harness.version": __version__, "harness.sweep_sha256": file_sha256(prepared.path),
         "harness.sweep_path": str(prepared.path.resolve()), "harness.results_dir": str(results_dir.resolve()),
         "harness.cache_dir": str(cache_dir.resolve()) if cache_dir else "",
         "harness.question": sweep.question, "harness.reused_trials": str(len(prepared.trials) - len(pending)),
         "harness.orphans_marked_killed": str(killed)})
    tracker.show_ranking(parent, sorted({ranking_metric(sweep.rank_by, c.labels is not None) for c in corpora.values()}))
    results: list[ConfigurationResult] = []
    scored, evidence_of, bar = None, None, None
    try:
        halving = sweep.search.strategy == "halving"
        executor = StageExecutor(corpora, prepared.trials, StageCache(cache_dir) if cache_dir else None, encode_progress)
        params = aligned_params(prepared.trials)
        bar = progress(total=len(pending), desc="trials", unit="trial") if progress else None
        # Wait until the store holds the sweep run: a store that cannot be written fails here, before any
        # computation, and a sweep killed from now on leaves its run for the next start to mark KILLED.
        tracker.flush()
        if dask_client is not None and not halving:
            from harness.engine.distributed import precompute_on_cluster
            from harness.engine.distributed_encode import encode_on_cluster
            from harness.engine.distributed_scores import evidence_on_cluster, score_on_cluster

            # Inside the try: whatever the cluster does, the sweep run is closed, never left RUNNING.
            encode_on_cluster(executor, pending, dask_client, **({"chunk_size": chunk_texts} if chunk_texts else {}))
            precompute_on_cluster(executor, pending, dask_client)
            scored = score_on_cluster(executor, pending, sweep.evidence, dask_client)
            evidence_of = evidence_on_cluster(dask_client)
        tracker.log_text(parent, prepared.path.read_text(), "sweep.yaml")
        tracker.log_text(parent, json.dumps(dataset_cards(corpora, prepared.models), indent=2), "dataset_cards.json")
        halving_seeds, halving_work, halving_stages = [], {}, []
        if halving:
            results, halving_seeds, halving_work, halving_stages, halving_log = _halving_search(
                tracker, prepared, corpora, done, parent, encode_progress, resume,
                bar.update if bar else (lambda: None), executor)
            for rounds in halving_log.values():
                for entry in (c for r in rounds["rounds"] for c in r["configurations"]):
                    entry["run_id"] = tracker.run_id(entry["run_id"])
            tracker.log_text(parent, json.dumps(halving_log, indent=2), HALVING_ARTIFACT)
        else:
            for configuration in configurations(prepared.trials):
                results.append(_run_configuration(tracker, executor, configuration, done, corpora[configuration[0].dataset],
                                                  params, sweep.evidence, parent, bar.update if bar else (lambda: None),
                                                  configuration_settings(prepared, configuration),
                                                  scored=scored, configuration_evidence=evidence_of))
        executor.work.update(halving_work)
        executor.stage_log += halving_stages
        rankings = rank_configurations(results, sweep, corpora)
        across = None
        for ranking in rankings.values():
            for row in ranking.rows:
                tracker.log_results(row.configuration.run_id, {"rank": row.rank, "tied_with_leader": float(row.tied)}
                                    if row.tied is not None else {"rank": row.rank}, tags=ranking.tags)
            _log_winner_map(tracker, executor, ranking, corpora[ranking.dataset], sweep.evidence, winner_map)
        tracker.log_text(parent, "\n\n".join(leaderboard_table(r) for r in rankings.values()), "leaderboard.txt")
        if len(rankings) >= 2:
            across = _log_across_verdict(tracker, parent, rankings, params, sweep.name)
        trial_results = halving_seeds if halving else [r for c in results for r in c.seeds]
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
        tracker.close()
    if tracker.error is not None:
        raise HarnessError(tracker.error)
    parent = tracker.resolved(parent)
    for configuration in results:
        configuration.run_id = tracker.resolved(configuration.run_id)
    for seed in [*trial_results, *(r for c in results for r in c.seeds)]:
        seed.run_id = tracker.resolved(seed.run_id)
    return SweepResult(parent_run_id=parent, tracking_uri=tracking_uri, results=trial_results, work=dict(executor.work),
                       rankings=rankings, configurations=results, stage_log=executor.stage_log, across=across)


def run_sweep_file(path: str | Path, results_dir: Path, tracking_uri: str | None = None, *,
                   cache_dir: Optional[Path] = None, use_cache: bool = True, resume: bool = True,
                   progress: Optional[ProgressFactory] = None, encode_progress=None,
                   executor: str = "local", scheduler: Optional[str] = None, winner_map: bool = True,
                   chunk_texts: Optional[int] = None) -> SweepResult:
    """Everything ``harness run`` does, minus printing. The cache defaults to RESULTS_DIR/cache. ``chunk_texts``:
    texts per encode task on a cluster (default ``distributed_encode.CHUNK_TEXTS``)."""
    from harness.track.tracking import default_tracking_uri

    from harness.track.tracking import check_reachable
    from harness.track.queued import writer_process

    writer_process()  # started first: its imports overlap loading the data and the models
    prepared = prepared_sweep(path)
    corpora = loaded_corpora(prepared)
    check_against_data(prepared, corpora)
    if tracking_uri:
        check_reachable(tracking_uri)  # before anything is written
    results_dir.mkdir(parents=True, exist_ok=True)
    client = None
    if executor == "dask":
        from harness.engine.distributed import dask_client

        client = dask_client(scheduler)
    try:
        return execute_sweep(
            prepared, corpora, results_dir=results_dir, tracking_uri=tracking_uri or default_tracking_uri(results_dir),
            cache_dir=(cache_dir or results_dir / "cache") if use_cache else None, resume=resume,
            progress=progress, encode_progress=encode_progress, dask_client=client, winner_map=winner_map,
            chunk_texts=chunk_texts,
        )
    finally:
        if client is not None:
            cluster = getattr(client, "cluster_to_close", None)
            client.close()
            if cluster is not None:
                cluster.close()
