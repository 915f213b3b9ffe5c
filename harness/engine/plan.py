"""From a sweep to trials and stage keys, without running anything.

A trial is one point of the grid. Each trial is a chain of stages
(encode -> pool -> transform -> reduce -> cluster); a stage's key hashes its own
settings, the key of the stage before it and the versions of the libraries that
compute it, so trials sharing a prefix share those stages' outputs.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass, field, replace
from functools import lru_cache
from importlib import metadata
from typing import Any

import numpy as np

from harness._settings import Settings
from harness.datasets import Corpus, dataset_name
from harness.embed.layers import LayerChoice
from harness.embed.lexical import LEXICAL_POOLING
from harness.embed.models import ResolvedModel
from harness.embed.pooling import MEAN_SCALED
from harness.embed.precomputed import PRECOMPUTED_POOLING, vectors_source
from harness.embed.static_vectors import STATIC_POOLINGS
from harness.geometry.cluster import SEEDED_CLUSTERERS
from harness.geometry.reduce import GRAPH_REDUCERS, SCALE_INVARIANT_REDUCERS, SEEDED_REDUCERS, neighbour_method
from harness.geometry.transforms import NORMALIZATIONS, SCALE_REMOVING, chain_label
from harness.keys import array_digest, chained_key, settings_key
from harness.sweep import KEY_FAMILIES, TRANSFORMER_FAMILIES, ModelSettings, Sweep

STAGE_KINDS = ("encode", "pool", "transform", "reduce", "cluster")
# With the neighbour graph UMAP fits share (a stage of UMAP trials only), in the order they run: what
# `harness plan` counts and `plan --estimate` costs.
PLANNED_KINDS = ("encode", "pool", "transform", "graph", "reduce", "cluster")

# The libraries whose versions enter each stage's key ("score": the scores of a seed run, in its trial key).
STAGE_LIBRARIES: dict[str, tuple[str, ...]] = {
    "encode": ("torch", "transformers", "sentence-transformers", "tokenizers"),
    "pool": ("torch",),
    "transform": ("numpy",),
    "graph": ("umap-learn", "pynndescent", "scikit-learn", "numba"),
    "reduce": ("umap-learn", "scikit-learn", "numba"),
    "cluster": ("hdbscan", "scikit-learn"),
    "score": ("scikit-learn", "scipy", "numpy", "pandas", "hdbscan"),
}

# The version of the score formulas (harness/score/scoring.py, harness/metrics/, harness/score/evidence.py). It
# enters every trial key and configuration key, so a resumed sweep does not reuse the metrics of runs logged under
# other formulas. Bump it in any change that moves a logged score; tests/test_scores_version.py holds the scores of a
# small fixed input for this version and fails until it is bumped and they are recorded anew.
# 2: bootstrap intervals count pairs of distinct texts (ARI) and re-centre AMI, NMI and V; DBCV is NaN on
#    duplicate points instead of failing the trial.
# 3: the silhouette is computed in float64 (float32 distances rounded differently with the BLAS threads).
# 4: length_leakage_r2 chooses its ridge penalty by cross-validation on each training fold (RidgeCV).
# 5: the same figures by other arithmetic, equal to the last bits or nearly: the silhouette's cluster sums by a
#    matrix product, the leakage's leave-one-out from one eigendecomposition, DBCV vectorised.
# 6: a trial's ARI, AMI, NMI, V, homogeneity and completeness from one contingency table (scikit-learn's formulas,
#    the bootstrap's arithmetic) instead of scikit-learn's functions: equal to 1e-12 on the tested cases (AMI about
#    1e-11 with thousands of clusters), moved in the last bits.
SCORES_VERSION = 6

# Settings that cannot change any number a seed run logs, each with the reason. Every other field of the
# typed settings (the Sweep and everything nested in it) enters the trial key: through the dataset's content
# (dataset_key), a stage key, or the trial's params. tests/test_trial_key.py walks every field of those
# settings models and fails for one that changes no trial key unless it is listed here.
RESULT_NEUTRAL: dict[str, str] = {
    "Sweep.name": "names the MLflow experiment; finished trials are looked up in that experiment only",
    "Sweep.question": "free text shown in the report",
    "Sweep.rank_by": "orders configurations; the ranking is recomputed on every run",
    "EvidenceSettings.resamples": "configuration-level intervals and ties, recomputed on every run from the "
                                  "seeds' labels; no seed run's figure depends on it",
    "EvidenceSettings.level": "as resamples: configuration-level, recomputed on every run",
    "EvidenceSettings.seed": "as resamples: configuration-level, recomputed on every run",
    "ModelSettings.batch_size": "how many texts share a forward pass; padding is masked out, so the vectors agree "
                                "to float rounding (measured: within 2 float32 ulps of the scale for every pooling; "
                                "tests/test_pooling.py checks 1e-5 over batch sizes 1, 2, 3, 7, 32), and the "
                                "pooled-vector cache holds one of them. Not under backend onnx_int8, which "
                                "quantises per batch: there it enters the encode key (ROW_INDEPENDENT_BACKENDS)",
    "SearchSettings.strategy": "which configurations run on which subsample; a round's subsample enters its trials' "
                               "keys by its content (dataset_key), so no seed run's figure depends on the setting",
    "SearchSettings.start_texts": "as strategy: the subsample's texts are keyed by content",
    "SearchSettings.seed": "as strategy: the subsample's texts are keyed by content",
    "SearchSettings.factor": "as strategy: the subsample's texts are keyed by content",
    "FileSource.format": "how the file is parsed; the corpus read is keyed by its content",
    "FileSource.max_chars": "a refusal threshold: a corpus that loads is the same under any value",
}

# Backends under which a text's vectors do not depend on the other texts of its batch (to float rounding):
# tests/test_halving.py checks every backend of the schema against this list.
ROW_INDEPENDENT_BACKENDS = ("torch", "onnx")

# Model fields that enter by content rather than by value: the files they name are in the weights digest.
MODEL_FIELDS_BY_CONTENT = frozenset({"vectors", "vocabulary", "ids"})


@lru_cache(maxsize=None)
def library_versions(kind: str) -> dict[str, str]:
    versions = {}
    for name in STAGE_LIBRARIES[kind]:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = "absent"
    return versions


@dataclass(frozen=True)
class Stage:
    kind: str
    key: str
    parent: str | None
    settings: dict[str, Any]


@dataclass(frozen=True)
class Trial:
    """One point of the grid, with the keys of its stages."""

    dataset: str
    model: ModelSettings
    resolved_model: ResolvedModel
    layers: LayerChoice
    pooling: str
    normalize: str
    transform: tuple  # the grid's transform chain (steps); the normalisation is appended after it
    reducer: Settings
    clusterer: Settings
    seed: int
    stages: dict[str, Stage] = field(compare=False)
    sweep_params: dict[str, Any] = field(default_factory=dict, compare=False)  # sweep-wide settings that change scores
    # The pool and transform stages of the trial's OWN pooling. They differ from ``stages`` where the chain is
    # computed from another pooling (mean_sqrt_len from mean); figures of the trial's own vectors
    # (length leakage, silhouette) are measured on these.
    own_stages: dict[str, Stage] = field(default_factory=dict, compare=False)
    model_label: str = ""  # the model as named in run names: the shortest tail of its label that no other model shares
    key: str = ""
    config_key: str = ""  # the same for the seeds of one configuration
    equivalent_to: str | None = None  # key of an earlier trial that shares every stage

    @property
    def params(self) -> dict[str, Any]:
        """Flat, consistently named settings: the MLflow params of the trial's run."""
        flat = {
            "dataset": self.dataset,
            **model_params(self.model),
            "layers": self.layers,
            "pooling": self.pooling,
            "normalize": self.normalize,
            "transform": chain_label(list(self.transform)),
            "seed": self.seed,
        }
        flat.update({f"reduce.{k}": v for k, v in self.reducer.as_params().items()})
        flat.update({f"cluster.{k}": v for k, v in self.clusterer.as_params().items()})
        flat.update(self.sweep_params)
        return flat

    @property
    def steps(self) -> list[Settings]:
        """The whole post-processing chain: the grid's transform, then the normalisation."""
        return effective_chain(self.transform, self.normalize)

    @property
    def config_params(self) -> dict[str, Any]:
        return {k: v for k, v in self.params.items() if k != "seed"}

    @property
    def config_name(self) -> str:
        """dataset/model/layers/pooling/transform/reducer/clusterer, every setting that differs shown (see _short)."""
        transform = chain_label(list(self.transform)) + ("" if self.normalize == "none" else f"+{self.normalize}")
        model = self.model_label or self.model.label.rsplit("/", 1)[-1]
        return f"{self.dataset}/{model}/{self.layers}/{self.pooling}/{transform}/{_short(self.reducer)}/{_short(self.clusterer)}"

    @property
    def name(self) -> str:
        return f"{self.config_name}/s{self.seed}"


def model_params(model: ModelSettings) -> dict[str, Any]:
    """Every result-changing field of a model entry, by name (``model`` for its name); a family's own fields only
    for that family. Files it names enter by content (the weights digest), not by path."""
    flat: dict[str, Any] = {"model": model.name}
    for name, value in model.as_params().items():
        if name == "name" or name in MODEL_FIELDS_BY_CONTENT or f"ModelSettings.{name}" in RESULT_NEUTRAL:
            continue
        if name in KEY_FAMILIES and model.family not in KEY_FAMILIES[name]:
            continue
        flat[name] = ("model_default" if name == "max_length" else "default") if value is None else value
    return flat


def sweep_params(sweep: Sweep) -> dict[str, Any]:
    """Sweep-wide settings that change a seed run's figures: the storage dtype and the evidence settings used per seed."""
    flat: dict[str, Any] = {"storage_dtype": sweep.storage_dtype}
    flat.update({f"evidence.{k}": v for k, v in sweep.evidence.as_params().items()
                 if f"EvidenceSettings.{k}" not in RESULT_NEUTRAL})
    return flat


# The setting shown right after a method's name (umap5, kmeans6, hdbscan15) and short names for the others.
TELLING = {"umap": "n_components", "pca": "n_components", "kmeans": "k", "hdbscan": "min_cluster_size"}
ABBREVIATIONS = {"n_neighbors": "nn", "min_dist": "md", "min_samples": "ms", "n_init": "ninit", "n_components": "nc"}
VALUE_ONLY = frozenset({"metric", "cluster_selection_method"})  # values that name themselves (euclidean, leaf)


def _short(settings: Settings) -> str:
    """A method, its telling setting, and every other setting that differs from its default, so that two different
    settings never share a name: umap5, umap5-nn10-euclidean, hdbscan15-ms5-leaf, kmeanslabels-ninit3."""
    params = settings.as_params()
    method = params.pop("method")
    if method == "agglomerative":  # every field shows: linkage, metric, and the cut (k or a distance threshold)
        cut = params["k"] if params["k"] is not None else f"t{params['distance_threshold']:g}"
        return f"{method}-{params['linkage']}{'-cos' if params['metric'] == 'cosine' else ''}-{cut}"
    telling = TELLING.get(method)
    name = method + (str(params.pop(telling)) if telling in params else "")
    defaults = {k: f.get_default(call_default_factory=True) for k, f in type(settings).model_fields.items()}
    for key, value in params.items():
        if value != defaults.get(key):
            name += f"-{value}" if key in VALUE_ONLY else f"-{ABBREVIATIONS.get(key, key)}{value}"
    return name


def distinct_model_labels(labels: list[str]) -> dict[str, str]:
    """Each model label's shortest tail of path parts that no other label of the sweep ends with (org/name -> name)."""
    parts = {label: label.split("/") for label in labels}
    shown = {}
    for label, pieces in parts.items():
        for size in range(1, len(pieces) + 1):
            tail = "/".join(pieces[-size:])
            if not any(other != label and ("/".join(p[-size:]) == tail) for other, p in parts.items()):
                break
        shown[label] = tail.replace("/", "--")  # names are split on "/" into their axes
    return shown


def dataset_key(corpus: Corpus) -> str:
    """Key of a loaded dataset: its content (texts in order, gold labels, ids, label names), never its settings.

    Whatever produced the corpus (a file's bytes, a mirror folder named by the sweep or by
    HARNESS_DATA_DIR, the network route, sampling, length balancing with some tokenizer, the
    loader's own code) acts on the result only through this content, so no change to any of
    them can leave a stale key, and two entries that load the same corpus share their stages.
    """
    return settings_key({
        "fingerprint": corpus.fingerprint,
        "ids": array_digest(np.asarray(corpus.ids).astype(str)),
        "label_names": list(corpus.label_names) if corpus.label_names is not None else None,
    })


def make_stage(kind: str, parent: str | None, settings: dict[str, Any]) -> Stage:
    full = {**settings, "versions": library_versions(kind)}
    return Stage(kind=kind, key=chained_key(kind, parent, full), parent=parent, settings=settings)


# Which poolings and layer choices each family has; a grid point a family lacks is left out for that model.
FAMILY_POOLINGS: dict[str, tuple[str, ...] | None] = {
    "sentence_transformer": None, "transformer": None, "static": STATIC_POOLINGS, "lexical": (LEXICAL_POOLING,),
    "precomputed": (PRECOMPUTED_POOLING,),
}
# Families with one vector per text and no pooling or layer choice: every grid point maps to that vector.
SINGLE_VECTOR_FAMILIES = frozenset({"lexical", "precomputed"})


def family_settings(model: ModelSettings, resolved: ResolvedModel) -> dict[str, Any]:
    """The encode settings of a family beyond the weights: for transformers, the hardware that ran the forward pass
    (we could not show that a GPU's vectors agree with the CPU's within a tolerance that leaves clusters unchanged),
    the folder's config, tokenizer and code files (and, for an ONNX backend, the opset and exporting libraries); a
    family's own settings otherwise."""
    if model.family == "static":
        return {"sif_a": model.sif_a, "remove_first_component": model.remove_first_component}
    if model.family == "lexical":
        return {"dimensions": model.dimensions}
    if model.family in TRANSFORMER_FAMILIES:
        from harness.embed.models import model_files_digest

        settings: dict[str, Any] = {"device": resolved.device.key, "model_files": model_files_digest(resolved.folder)}
        if model.backend != "torch":
            from harness.embed.onnx_backend import export_settings

            settings["export"] = export_settings()
        return settings
    if model.family == "precomputed":  # the vectors' and ids' bytes are in resolved.weights_digest
        tokenizer = resolved.length_tokenizer
        source = vectors_source(model)  # defaults filled in: a default spelled out keys as the default
        return {"id_column": source.id_column, "vector_column": source.vector_column,
                "length_tokenizer": "words" if tokenizer is None else f"{tokenizer.name}@{tokenizer.weights_digest}"}
    return {}


def applicable(model: ModelSettings, layers: LayerChoice, pooling: str) -> tuple[LayerChoice, str] | None:
    """The (layers, pooling) a family computes for a grid point, or None if the family has no such pooling."""
    allowed = FAMILY_POOLINGS[model.family]
    if allowed is None:
        return layers, pooling
    if model.family in SINGLE_VECTOR_FAMILIES:
        return "last", allowed[0]
    return ("last", pooling) if pooling in allowed else None


def pool_stage(encode_key: str, layers: LayerChoice, pooling: str, dtype: str) -> Stage:
    """The pool stage of one variant: every variant of an encode key comes from its one forward pass."""
    return make_stage("pool", encode_key, {"layers": layers, "pooling": pooling, "dtype": dtype})


def effective_chain(transform, normalize: str) -> list[Settings]:
    return list(transform) + NORMALIZATIONS[normalize]


def scale_invariant_path(chain: list[Settings], reducer: Settings) -> bool:
    """Whether multiplying each pooled row by a positive factor leaves the clustering unchanged."""
    if chain:
        return chain[0].method in SCALE_REMOVING
    invariant = SCALE_INVARIANT_REDUCERS.get(reducer.method)
    return invariant is not None and invariant(reducer)


def mean_scaled_per_text(model: ModelSettings) -> bool:
    """Whether this model's mean_sqrt_len vector of a text is its mean vector times a positive factor.

    Not under ``long_texts: chunk_mean`` (windows of different lengths are averaged, each with
    its own factor) nor for static vectors with ``remove_first_component`` (the component is
    removed from each pooling's vectors separately). tests/test_equivalences.py computes both
    sides of every pair this lets the planner merge.
    """
    if model.family in ("sentence_transformer", "transformer"):
        return model.long_texts == "truncate"
    if model.family == "static":
        return not model.remove_first_component
    return False


def computed_pooling(pooling: str, chain: list[Settings], reducer: Settings, model: ModelSettings) -> str:
    """The pooling whose output a trial's downstream stages are computed from.

    Where mean and mean_sqrt_len differ by a positive factor per text, a scale-invariant
    path gives them the same clusters, so both are computed from mean.
    """
    if pooling in MEAN_SCALED and mean_scaled_per_text(model) and scale_invariant_path(chain, reducer):
        return "mean"
    return pooling


def trial_stages(
    dataset_key_: str, model: ModelSettings, resolved: ResolvedModel, layers: LayerChoice, pooling: str,
    chain: list[Settings], reducer: Settings, clusterer: Settings, seed: int, dtype: str = "float32",
    n_texts: int | None = None,
) -> dict[str, Stage]:
    """The trial's stage chain; a graph-based reducer (UMAP) adds a ``graph`` stage between transform and reduce,
    whose exact-or-approximate choice follows ``n_texts`` (exact when unknown)."""
    encode = make_stage("encode", dataset_key_, {
        "model": resolved.name, "family": model.family, "weights": resolved.weights_digest,
        "max_length": model.max_length, "long_texts": model.long_texts, "backend": model.backend,
        "trust_remote_code": model.trust_remote_code, **family_settings(model, resolved),
        # int8 ONNX quantises activations with one scale per batch, so the batch changes the vectors beyond rounding
        **({"batch_size": model.batch_size} if model.backend not in ROW_INDEPENDENT_BACKENDS else {}),
    })
    pool = pool_stage(encode.key, layers, computed_pooling(pooling, chain, reducer, model), dtype)
    transform = make_stage("transform", pool.key, {"chain": [step.as_params() for step in chain]})
    reduce_settings = reducer.as_params()
    if reduce_settings["method"] in SEEDED_REDUCERS:
        reduce_settings["seed"] = seed
    graph = None
    if reduce_settings["method"] in GRAPH_REDUCERS:
        graph = graph_stage(transform.key, reducer, n_texts)
    reduce = make_stage("reduce", graph.key if graph else transform.key, reduce_settings)
    cluster_settings = clusterer.as_params()
    if cluster_settings["method"] in SEEDED_CLUSTERERS:
        cluster_settings["seed"] = seed
    cluster = make_stage("cluster", reduce.key, cluster_settings)
    stages = {"encode": encode, "pool": pool, "transform": transform, "reduce": reduce, "cluster": cluster}
    return stages if graph is None else {**stages, "graph": graph}


def graph_stage(transform_key: str, reducer: Settings, n_texts: int | None) -> Stage:
    """The neighbour graph a UMAP fit starts from: keyed by the vectors (their transform key), the metric,
    n_neighbors and whether it is exact, never by the seed, n_components or min_dist, which only shape the layout."""
    method = neighbour_method(0 if n_texts is None else n_texts)
    return make_stage("graph", transform_key, {"metric": reducer.metric, "n_neighbors": reducer.n_neighbors,
                                               "method": method})


def own_stages(stages: dict[str, Stage], layers: LayerChoice, pooling: str) -> dict[str, Stage]:
    """The pool and transform stages of a trial's own pooling (the same stages when it is computed from them)."""
    if stages["pool"].settings["pooling"] == pooling:
        return {"pool": stages["pool"], "transform": stages["transform"]}
    pool = pool_stage(stages["encode"].key, layers, pooling, stages["pool"].settings["dtype"])
    return {"pool": pool, "transform": make_stage("transform", pool.key, stages["transform"].settings)}


def planned_trials(sweep: Sweep, dataset_keys: dict[str, str], models: dict[str, ResolvedModel],
                   dataset_sizes: dict[str, int] | None = None) -> list[Trial]:
    """The cartesian product datasets x models x grid axes, in a stable order. ``dataset_sizes`` (texts per
    dataset) choose exact or approximate neighbour graphs; unknown sizes plan exact ones."""
    grid = sweep.grid
    shared = sweep_params(sweep)
    shown = distinct_model_labels([m.label for m in sweep.models])
    trials = []
    for spec, model in itertools.product(sweep.datasets, sweep.models):
        name = dataset_name(spec)
        resolved = models[model.label]
        seen: set[tuple] = set()
        for grid_layers, grid_pooling, transform, normalize, reducer, clusterer, seed in itertools.product(
            grid.layers, grid.pooling, grid.transform, grid.normalize, grid.reduce, grid.cluster, grid.seeds
        ):
            point = applicable(model, grid_layers, grid_pooling)
            grid_point = (point, tuple(transform), normalize, reducer, clusterer, seed)
            if point is None or grid_point in seen:
                continue
            seen.add(grid_point)
            layers, pooling = point
            chain = effective_chain(transform, normalize)
            stages = trial_stages(dataset_keys[name], model, resolved, layers, pooling, chain, reducer, clusterer,
                                  seed, sweep.storage_dtype, n_texts=(dataset_sizes or {}).get(name))
            trial = Trial(
                dataset=name, model=model, resolved_model=resolved, layers=layers, pooling=pooling,
                normalize=normalize, transform=tuple(transform), reducer=reducer, clusterer=clusterer, seed=seed,
                stages=stages, own_stages=own_stages(stages, layers, pooling), sweep_params=shared,
                model_label=shown[model.label],
            )
            identity = trial_identity(trial)
            trials.append(replace(trial, key=settings_key({**identity, "params": trial.params}),
                                  config_key=settings_key({**identity, "params": trial.config_params})))
    return _marked_equivalents(trials)


def trial_identity(trial: Trial) -> dict[str, Any]:
    """What, besides its params, a trial's results depend on: the stage chains of its own vectors, of the vectors
    its clusters are computed from and of its neighbour graph (which hold the data's content, the model's files,
    every stage's settings and library versions, and the graph's method, which no param names), and the
    libraries of reduction, clustering and scoring. Nothing in it depends on the seed (a param), so the seeds of a
    configuration share it."""
    from harness import __version__

    return {
        "own_vectors": trial.own_stages["transform"].key,
        "clustered_vectors": trial.stages["transform"].key,
        "neighbour_graph": trial.stages["graph"].key if "graph" in trial.stages else None,
        "versions": {"harness": __version__, **{kind: library_versions(kind) for kind in ("reduce", "cluster", "score")}},
        "scores_version": SCORES_VERSION,
    }


def _marked_equivalents(trials: list[Trial]) -> list[Trial]:
    """Point each trial whose whole stage chain an earlier trial already has at that trial."""
    first: dict[str, str] = {}
    marked = []
    for trial in trials:
        representative = first.setdefault(trial.stages["cluster"].key, trial.key)
        marked.append(trial if representative == trial.key else replace(trial, equivalent_to=representative))
    return marked


NOT_APPLICABLE = "n/a"


def aligned_params(trials: list[Trial]) -> dict[str, dict[str, Any]]:
    """Each trial's params under the union of all names (``n/a`` where a setting does not apply), by trial key.

    The same names on every run of a sweep keep MLflow's compare and parallel-coordinates views aligned.
    """
    names = sorted({name for trial in trials for name in trial.params})
    return {t.key: {name: t.params.get(name, NOT_APPLICABLE) for name in names} for t in trials}


def configurations(trials: list[Trial]) -> list[list[Trial]]:
    """Trials grouped by configuration (all seeds of one setting), in plan order."""
    groups: dict[str, list[Trial]] = {}
    for trial in trials:
        groups.setdefault(trial.config_key, []).append(trial)
    return list(groups.values())


def needed_stages(trials: list[Trial], kind: str) -> dict[str, Trial]:
    """Distinct stages of a kind the trials need, each with a trial that needs it (own pooled variants included)."""
    needed = {t.stages[kind].key: t for t in trials if kind in t.stages}  # "graph": UMAP trials only
    if kind in ("pool", "transform"):
        needed.update({t.own_stages[kind].key: t for t in trials if t.own_stages[kind].key not in needed})
    return needed


def stage_counts(trials: list[Trial]) -> dict[str, int]:
    """Distinct stages of each kind the trials need (encode = forward passes)."""
    return {kind: len(needed_stages(trials, kind)) for kind in STAGE_KINDS}


@dataclass(frozen=True)
class StageWork:
    kind: str
    needed: int
    cached: int

    @property
    def to_run(self) -> int:
        return self.needed - self.cached


def stage_work(trials: list[Trial], is_cached) -> list[StageWork]:
    """Per stage kind: distinct stages needed and how many ``is_cached(kind, key)`` already holds.

    A forward pass is needed for an encode key when any of its pooled variants is missing.
    """
    work = []
    for kind in PLANNED_KINDS:
        stages = needed_stages(trials, kind)
        if kind == "encode":
            cached = sum(
                all(is_cached("pool", t.stages["pool"].key) and is_cached("pool", t.own_stages["pool"].key)
                    for t in trials if t.stages["encode"].key == key)
                and is_cached("encode", key)
                for key in stages
            )
        else:
            cached = sum(is_cached(kind, key) for key in stages)
        work.append(StageWork(kind, len(stages), cached))
    return work
