"""From a sweep to trials and stage keys, without running anything.

A trial is one point of the grid. Each trial is a chain of stages
(encode -> pool -> transform -> reduce -> cluster); a stage's key hashes its own
settings, the key of the stage before it and the versions of the libraries that
compute it, so trials sharing a prefix share those stages' outputs.
"""

from __future__ import annotations

import hashlib
import itertools
from dataclasses import dataclass, field, replace
from functools import lru_cache
from importlib import metadata
from pathlib import Path
from typing import Any

from harness._settings import Settings
from harness.cluster import SEEDED_CLUSTERERS
from harness.datasets import dataset_name
from harness.keys import chained_key, settings_key
from harness.layers import LayerChoice
from harness.models import ResolvedModel
from harness.lexical import LEXICAL_POOLING
from harness.pooling import MEAN_SCALED
from harness.precomputed import PRECOMPUTED_POOLING, vectors_source
from harness.static_vectors import STATIC_POOLINGS
from harness.reduce import SCALE_INVARIANT_REDUCERS, SEEDED_REDUCERS
from harness.sweep import TRANSFORMER_FAMILIES, ModelSettings, Sweep
from harness.transforms import NORMALIZATIONS, SCALE_REMOVING, chain_label

STAGE_KINDS = ("encode", "pool", "transform", "reduce", "cluster")

# The libraries whose versions enter each stage's key.
STAGE_LIBRARIES: dict[str, tuple[str, ...]] = {
    "encode": ("torch", "transformers", "sentence-transformers"),
    "pool": ("torch",),
    "transform": ("numpy",),
    "reduce": ("umap-learn", "scikit-learn", "numba"),
    "cluster": ("hdbscan", "scikit-learn"),
}


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
    key: str = ""
    config_key: str = ""  # the same for the seeds of one configuration
    equivalent_to: str | None = None  # key of an earlier trial that shares every stage

    @property
    def params(self) -> dict[str, Any]:
        """Flat, consistently named settings: the MLflow params of the trial's run."""
        flat = {
            "dataset": self.dataset,
            "model": self.model.name,
            "family": self.model.family,
            "backend": self.model.backend,
            "max_length": self.model.max_length if self.model.max_length is not None else "model_default",
            "long_texts": self.model.long_texts,
            **({"device": self.model.device} if self.model.family in TRANSFORMER_FAMILIES else {}),
            "layers": self.layers,
            "pooling": self.pooling,
            "normalize": self.normalize,
            "transform": chain_label(list(self.transform)),
            "seed": self.seed,
        }
        flat.update({f"reduce.{k}": v for k, v in self.reducer.as_params().items()})
        flat.update({f"cluster.{k}": v for k, v in self.clusterer.as_params().items()})
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
        return (
            f"{self.dataset}/{self.model.label.rsplit('/', 1)[-1]}/{self.layers}/{self.pooling}/"
            f"{chain_label(self.steps)}/{_short(self.reducer)}/{_short(self.clusterer)}"
        )

    @property
    def name(self) -> str:
        return f"{self.config_name}/s{self.seed}"


def _short(settings: Settings) -> str:
    """A method and the settings that tell its variants apart, e.g. umap5 or hdbscan15leaf."""
    params = settings.as_params()
    method = params.pop("method")
    if method == "agglomerative":
        cut = params["k"] if params["k"] is not None else f"t{params['distance_threshold']:g}"
        return f"{method}-{params['linkage']}{'-cos' if params['metric'] == 'cosine' else ''}-{cut}"
    telling = {"umap": ("n_components",), "pca": ("n_components",), "kmeans": ("k",), "hdbscan": ("min_cluster_size",)}
    suffix = "".join(str(params[k]) for k in telling.get(method, ()) if k in params)
    if params.get("cluster_selection_method") == "leaf":
        suffix += "leaf"
    return f"{method}{suffix}"


def dataset_key(spec: Settings, tokenizer_weights: str | None = None) -> str:
    """Key of a dataset entry: its settings, the bytes of a file it reads, and the tokenizer it balances lengths with."""
    settings = spec.as_params()
    if tokenizer_weights is not None:
        settings["length_tokenizer"] = tokenizer_weights
    path = getattr(spec, "path", None)
    if isinstance(path, Path):
        settings["file_sha256"] = _file_digest(path, path.stat().st_size, path.stat().st_mtime_ns)
    return settings_key(settings)


@lru_cache(maxsize=64)
def _file_digest(path: Path, size: int, mtime_ns: int) -> str:
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        for block in iter(lambda: handle.read(1 << 22), b""):
            digest.update(block)
    return digest.hexdigest()


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
    """Encode settings only some families have. The device enters as the hardware that ran the forward pass: we
    could not show that a GPU's vectors agree with the CPU's within a tolerance that leaves clusters unchanged."""
    if model.family in TRANSFORMER_FAMILIES:
        return {"device": resolved.device.key}
    if model.family == "static":
        return {"sif_a": model.sif_a, "remove_first_component": model.remove_first_component}
    if model.family == "lexical":
        return {"dimensions": model.dimensions}
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


def computed_pooling(pooling: str, chain: list[Settings], reducer: Settings) -> str:
    """The pooling whose output a trial's downstream stages are computed from.

    mean and mean_sqrt_len differ by a positive factor per row; on a scale-invariant
    path they give the same clusters, so both are computed from mean.
    """
    if pooling in MEAN_SCALED and scale_invariant_path(chain, reducer):
        return "mean"
    return pooling


def trial_stages(
    dataset_key_: str, model: ModelSettings, resolved: ResolvedModel, layers: LayerChoice, pooling: str,
    chain: list[Settings], reducer: Settings, clusterer: Settings, seed: int, dtype: str = "float32",
) -> dict[str, Stage]:
    encode = make_stage("encode", dataset_key_, {
        "model": resolved.name, "family": model.family, "weights": resolved.weights_digest,
        "max_length": model.max_length, "long_texts": model.long_texts, "backend": model.backend,
        **family_settings(model, resolved),
    })
    pool = pool_stage(encode.key, layers, computed_pooling(pooling, chain, reducer), dtype)
    transform = make_stage("transform", pool.key, {"chain": [step.as_params() for step in chain]})
    reduce_settings = reducer.as_params()
    if reduce_settings["method"] in SEEDED_REDUCERS:
        reduce_settings["seed"] = seed
    reduce = make_stage("reduce", transform.key, reduce_settings)
    cluster_settings = clusterer.as_params()
    if cluster_settings["method"] in SEEDED_CLUSTERERS:
        cluster_settings["seed"] = seed
    cluster = make_stage("cluster", reduce.key, cluster_settings)
    return {"encode": encode, "pool": pool, "transform": transform, "reduce": reduce, "cluster": cluster}


def planned_trials(sweep: Sweep, dataset_keys: dict[str, str], models: dict[str, ResolvedModel]) -> list[Trial]:
    """The cartesian product datasets x models x grid axes, in a stable order."""
    grid = sweep.grid
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
                                  seed, sweep.storage_dtype)
            trial = Trial(
                dataset=name, model=model, resolved_model=resolved, layers=layers, pooling=pooling,
                normalize=normalize, transform=tuple(transform), reducer=reducer, clusterer=clusterer, seed=seed,
                stages=stages,
            )
            identity = {"dataset": dataset_keys[name], "weights": resolved.weights_digest, "device": resolved.device.key}
            trials.append(replace(trial, key=settings_key({**identity, **trial.params}),
                                  config_key=settings_key({**identity, **trial.config_params})))
    return _marked_equivalents(trials)


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


def stage_counts(trials: list[Trial]) -> dict[str, int]:
    """Distinct stages of each kind the trials need (encode = forward passes)."""
    return {kind: len({t.stages[kind].key for t in trials}) for kind in STAGE_KINDS}


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
    for kind in STAGE_KINDS:
        stages = {t.stages[kind].key: t for t in trials}
        if kind == "encode":
            cached = sum(
                all(is_cached("pool", t.stages["pool"].key) for t in trials if t.stages["encode"].key == key)
                and is_cached("encode", key)
                for key in stages
            )
        else:
            cached = sum(is_cached(kind, key) for key in stages)
        work.append(StageWork(kind, len(stages), cached))
    return work
