"""The sweep file: parsed once, at the door, into frozen typed settings.

Every error names the file, the line, the key and what was expected, as one line.
"""

from __future__ import annotations

import difflib
import re
from pathlib import Path
from typing import Annotated, Any, Literal, Optional, Union

import yaml
from pydantic import AfterValidator, BeforeValidator, Field, PositiveInt, ValidationError, ValidationInfo, field_validator, model_validator

from harness import _yaml_lines
from harness._settings import Settings, relative_to_sweep
from harness.datasets import DatasetSettings, dataset_name
from harness.embed.devices import DEVICE_CHOICES, DEVICE_PATTERN
from harness.embed.layers import LAYER_SELECTIONS
from harness.embed.pooling import POOLINGS
from harness.errors import SweepError
from harness.geometry.cluster import ClustererSettings
from harness.geometry.reduce import ReducerSettings, UmapSettings
from harness.geometry.transforms import NORMALIZATIONS, TransformStep

LABELLED_METRICS = ("ari", "ami", "nmi", "v_measure", "ari_clustered", "ami_clustered", "nmi_clustered", "v_measure_clustered")
LABEL_FREE_METRICS = ("silhouette", "dbcv", "stability_ari", "npmi_mean", "cluster_size_entropy", "coverage")
RANKING_METRICS = LABELLED_METRICS + LABEL_FREE_METRICS
# Without labels the leaderboard ranks by silhouette: it is measured on the pooled vectors, the same space for
# every reducer and clusterer of a model, while DBCV is measured on each reduced space and cannot be compared
# across reducers.
DEFAULT_LABELLED_METRIC, DEFAULT_LABEL_FREE_METRIC = "ari", "silhouette"


def _one_of(value: Any, choices: Any, what: str) -> str:
    names = sorted(choices)
    hint = difflib.get_close_matches(str(value), names, n=1)
    did_you_mean = f" (did you mean '{hint[0]}'?)" if hint else ""
    return f"{value!r} is not {what}; expected one of {', '.join(names)}{did_you_mean}"


def _unique(values: list, what: str) -> list:
    seen = []
    for value in values:
        if value in seen:
            shown = value.as_params() if isinstance(value, Settings) else value
            raise ValueError(f"{what}: {shown!r} is listed twice")
        seen.append(value)
    return values


MODEL_FAMILIES = ("sentence_transformer", "transformer", "static", "lexical", "precomputed")
TRANSFORMER_FAMILIES = ("sentence_transformer", "transformer")
# Keys that only some families accept; every other key of a model entry applies to every family.
KEY_FAMILIES: dict[str, tuple[str, ...]] = {
    **{key: ("static",) for key in ("vocabulary", "sif_a", "remove_first_component")},
    "vectors": ("static", "precomputed"),
    **{key: ("precomputed",) for key in ("ids", "id_column", "vector_column", "length_tokenizer")},
    "dimensions": ("lexical",),
    "device": TRANSFORMER_FAMILIES,
}


class ModelSettings(Settings):
    """A model of the grid. ``family`` says how it turns texts into vectors:
    sentence_transformer (a sentence-transformers model), transformer (any Hugging Face encoder, loaded raw),
    static (averaged word vectors), lexical (TF-IDF + truncated SVD), precomputed (the user's own vectors)."""

    name: str = Field(min_length=1)
    family: Literal["sentence_transformer", "transformer", "static", "lexical", "precomputed"] = "sentence_transformer"
    max_length: Optional[PositiveInt] = None
    batch_size: PositiveInt = 64
    revision: Optional[str] = None
    trust_remote_code: bool = False
    long_texts: Literal["truncate", "chunk_mean"] = "truncate"
    backend: Literal["torch", "onnx", "onnx_int8"] = "torch"  # transformer families: ONNX Runtime, optionally int8
    vectors: Optional[str] = None  # static: a packaged name (glove-6b-50d) or a .npy file; default: the model's name
    vocabulary: Optional[Path] = None  # static: one word per line (.txt) or a one-column Parquet, in the .npy's row order
    sif_a: Optional[float] = Field(None, gt=0.0)  # static: smooth inverse frequency weighting a / (a + p(w))
    remove_first_component: bool = False  # static: Arora et al.'s common-component removal
    dimensions: PositiveInt = 100  # lexical: SVD dimensions
    ids: Optional[Path] = None  # precomputed .npy: one id per line, in the array's row order
    id_column: Optional[str] = None  # precomputed Parquet: the column of ids (default id)
    vector_column: Optional[str] = None  # precomputed Parquet: the column of vectors, a list of numbers (default vector)
    length_tokenizer: Optional[str] = None  # precomputed: a model whose tokenizer counts lengths; default: words
    device: str = "auto"  # transformer families: auto | cpu | cuda | cuda:N (auto: CUDA when torch sees a GPU)

    @model_validator(mode="before")
    @classmethod
    def _keys_of_other_families(cls, data: Any) -> Any:
        if isinstance(data, dict):
            family = data.get("family", "sentence_transformer")
            for key in sorted(set(KEY_FAMILIES) & set(data)):
                if family not in KEY_FAMILIES[key]:
                    raise ValueError(f"'{key}' applies to family {' or '.join(KEY_FAMILIES[key])}, not {family}")
        return data

    @field_validator("device")
    @classmethod
    def _device(cls, value: str) -> str:
        if not re.fullmatch(DEVICE_PATTERN, value):
            raise ValueError(f"{value!r} is not a device; expected {DEVICE_CHOICES}")
        return value

    @model_validator(mode="after")
    def _precomputed_file(self) -> "ModelSettings":
        if self.family != "precomputed":
            return self
        if self.vectors is None:
            raise ValueError("family precomputed needs 'vectors:', a .npy or .parquet file of one vector per text")
        suffix = Path(self.vectors).suffix
        if suffix not in (".npy", ".parquet"):
            raise ValueError(f"vectors: expected a .npy or .parquet file, got {self.vectors}")
        if suffix == ".npy" and (self.id_column or self.vector_column):
            raise ValueError("id_column and vector_column apply to a Parquet file; beside a .npy, give 'ids:' (a file "
                             "with one id per line)")
        if suffix == ".parquet" and self.ids is not None:
            raise ValueError("'ids:' applies to a .npy; a Parquet file names its id column with 'id_column:'")
        return self

    @model_validator(mode="after")
    def _device_fits_backend(self) -> "ModelSettings":
        if self.backend != "torch" and self.device not in ("auto", "cpu"):
            raise ValueError(f"device '{self.device}' needs backend torch; the {self.backend} backend runs on the CPU")
        return self

    @property
    def label(self) -> str:
        """The model's identity in a sweep: its name, with the family unless it is a sentence-transformers model."""
        return self.name if self.family == "sentence_transformer" else f"{self.name}[{self.family}]"

    @field_validator("vectors")
    @classmethod
    def _vectors(cls, value: Optional[str], info: ValidationInfo) -> Optional[str]:
        from harness.embed.models import PACKAGED_VECTORS

        if value is None or value.lower() in PACKAGED_VECTORS:
            return value
        return str(cls._existing_file(Path(value), info))

    @field_validator("vocabulary", "ids")
    @classmethod
    def _existing_file(cls, path: Optional[Path], info: ValidationInfo) -> Optional[Path]:
        if path is None:
            return None
        resolved = relative_to_sweep(path, info)
        if not resolved.is_file():
            raise ValueError(f"no such file: {resolved}")
        return resolved


def _registered(registry: dict, what: str) -> AfterValidator:
    def check(value: Any) -> Any:
        if isinstance(value, str) and value not in registry:
            raise ValueError(_one_of(value, registry, what))
        return value

    return AfterValidator(check)


def _names_of(registry: dict) -> Any:
    """The registry's names as the JSON Schema's enum, read when the schema is generated (registries can grow)."""
    return Field(json_schema_extra=lambda schema: schema.update(enum=sorted(registry)))


PoolingName = Annotated[str, _registered(POOLINGS, "a pooling"), _names_of(POOLINGS)]
LayerName = Annotated[Union[int, Annotated[str, _names_of(LAYER_SELECTIONS)]],
                      _registered(LAYER_SELECTIONS, "a layer selection (or an integer index)")]
NormalizationName = Annotated[str, _registered(NORMALIZATIONS, "a normalisation"), _names_of(NORMALIZATIONS)]


def _chain_shorthand(value: Any) -> Any:
    """'none' -> [], a single step (name or mapping) -> [step], a list stays a list."""
    if value == "none" or value is None:
        return []
    if isinstance(value, (str, dict)):
        return [value]
    return value


TransformChain = Annotated[list[TransformStep], BeforeValidator(
    _chain_shorthand, json_schema_input_type=Union[Literal["none"], None, TransformStep, list[TransformStep]])]


class GridSettings(Settings):
    pooling: list[PoolingName] = Field(min_length=1)
    layers: list[LayerName] = Field(default_factory=lambda: ["last"], min_length=1)
    normalize: list[NormalizationName] = Field(default_factory=lambda: ["none"], min_length=1)
    transform: list[TransformChain] = Field(default_factory=lambda: [[]], min_length=1)
    reduce: list[ReducerSettings] = Field(default_factory=lambda: [UmapSettings(method="umap")], min_length=1)
    cluster: list[ClustererSettings] = Field(min_length=1)
    seeds: list[int] = Field(default_factory=lambda: [0], min_length=1)

    @field_validator("pooling", "layers", "normalize", "transform", "seeds", "reduce", "cluster")
    @classmethod
    def _no_repeats(cls, values: list, info: ValidationInfo) -> list:
        return _unique(values, info.field_name)


class EvidenceSettings(Settings):
    """How much resampling backs each claim."""

    resamples: int = Field(1000, ge=0)  # bootstrap resamples of texts; 0 turns intervals and tie flags off
    level: float = Field(0.95, gt=0.0, lt=1.0)
    seed: int = 0
    permutations: int = Field(999, ge=1)  # for the length p-value
    max_points: PositiveInt = 5000  # silhouette and DBCV are computed on a seeded sample of at most this many texts
    top_terms: PositiveInt = 10


class SearchSettings(Settings):
    """How the grid is searched: every configuration on the whole corpus, or successive halving over sample sizes."""

    strategy: Literal["grid", "halving"] = "grid"
    start_texts: Optional[PositiveInt] = None  # halving: texts in the first round's stratified subsample
    factor: int = Field(3, ge=2)  # halving: keep the best 1/factor each round and multiply the texts by factor
    seed: int = 0  # halving: seeds the nested stratified subsamples

    @model_validator(mode="after")
    def _halving_needs_a_start(self) -> "SearchSettings":
        if self.strategy == "halving" and self.start_texts is None:
            raise ValueError("start_texts: halving needs the first round's number of texts (a positive integer)")
        return self


class Sweep(Settings):
    name: str = Field(min_length=1, pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]*$")
    question: str = ""
    datasets: list[DatasetSettings] = Field(min_length=1)
    models: list[ModelSettings] = Field(min_length=1)
    grid: GridSettings
    rank_by: Optional[Annotated[str, Field(json_schema_extra={"enum": list(RANKING_METRICS)})]] = None  # default: ari with labels, silhouette without
    evidence: EvidenceSettings = Field(default_factory=EvidenceSettings)
    storage_dtype: Literal["float32", "float16"] = "float32"  # how pooled vectors are kept in the cache
    search: SearchSettings = Field(default_factory=SearchSettings)

    @field_validator("models", mode="before", json_schema_input_type=list[Union[str, ModelSettings]])
    @classmethod
    def _model_shorthand(cls, values: Any) -> Any:
        if isinstance(values, list):
            return [{"name": v} if isinstance(v, str) else v for v in values]
        return values

    @field_validator("rank_by")
    @classmethod
    def _known_metric(cls, value: Optional[str]) -> Optional[str]:
        if value is not None and value not in RANKING_METRICS:
            raise ValueError(_one_of(value, RANKING_METRICS, "a ranking metric"))
        return value

    @field_validator("datasets")
    @classmethod
    def _distinct_dataset_names(cls, values: list) -> list:
        _unique([dataset_name(d) for d in values], "dataset name")
        return values

    @field_validator("models")
    @classmethod
    def _distinct_models(cls, values: list[ModelSettings]) -> list[ModelSettings]:
        _unique([m.label for m in values], "model")
        return values


def _key_path(loc: tuple, data: Any, missing_key: bool) -> tuple[list[Any], str]:
    """The YAML path an error location points at, and its dotted form.

    Pydantic inserts union tags ('umap', 'function-after[...]') into locations; they
    match no key in the data and are skipped, except the last step of a
    missing-key error, which names that key.
    """
    path, node = [], data
    for position, step in enumerate(loc):
        if isinstance(node, dict) and step in node:
            node = node[step]
        elif isinstance(node, list) and isinstance(step, int) and 0 <= step < len(node):
            node = node[step]
        elif missing_key and position == len(loc) - 1 and isinstance(node, dict):
            node = None
        else:
            continue
        path.append(step)
    dotted = ""
    for step in path:
        dotted += f"[{step}]" if isinstance(step, int) else (f".{step}" if dotted else str(step))
    return path, dotted


def _message(error: dict) -> str:
    kind, message = error["type"], error["msg"]
    if kind == "value_error":
        return message.removeprefix("Value error, ")
    if kind == "extra_forbidden":
        return "unknown key"
    if kind == "missing":
        return "required key is missing"
    if kind == "union_tag_invalid":
        ctx = error.get("ctx", {})
        return f"{ctx.get('tag')!r} is not a known {ctx.get('discriminator', '').strip(chr(39))}; expected one of {ctx.get('expected_tags', '')}"
    if kind == "union_tag_not_found":
        return f"missing '{error.get('ctx', {}).get('discriminator', '').strip(chr(39))}' key"
    got = error.get("input")
    shown = f" (got {got!r})" if not isinstance(got, (dict, list)) else ""
    return f"{message[0].lower()}{message[1:]}{shown}"


def sweep_from_text(text: str, source: str, base_dir: Path) -> Sweep:
    """Parse and validate sweep text; ``source`` names it in errors."""
    try:
        data = yaml.safe_load(text)
    except yaml.MarkedYAMLError as err:
        mark = err.problem_mark or err.context_mark
        where = f"{source}:{mark.line + 1}" if mark else source
        raise SweepError(f"{where}: not valid YAML: {err.problem or err.context}") from None
    except yaml.YAMLError as err:
        raise SweepError(f"{source}: not valid YAML: {str(err).splitlines()[0]}") from None
    if not isinstance(data, dict):
        raise SweepError(f"{source}:1: the sweep must be a mapping with keys name, datasets, models, grid; got {type(data).__name__}")
    try:
        return Sweep.model_validate(data, context={"base_dir": base_dir})
    except ValidationError as err:
        first = err.errors()[0]
        path, dotted = _key_path(first["loc"], data, first["type"] == "missing")
        line = _yaml_lines.line_of(_yaml_lines.node_lines(text), path)
        where = f"{source}:{line}" if line else source
        raise SweepError(f"{where}: {dotted or '(top level)'}: {_message(first)}") from None


def load_sweep(path: str | Path) -> Sweep:
    """Read and validate a sweep file. Raises SweepError with one line on any problem."""
    path = Path(path)
    try:
        raw = path.read_bytes()
    except OSError as err:
        raise SweepError(f"{path}: cannot read the sweep file: {err.strerror}") from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as err:
        raise SweepError(f"{path}: the sweep file is not valid UTF-8 (byte {err.start})") from None
    return sweep_from_text(text, str(path), path.parent)


def sweep_error_at(source: str | Path, key_path: list[Any], message: str) -> SweepError:
    """A SweepError for a key found wrong after parsing (against the data or the model), with its line."""
    try:
        line = _yaml_lines.line_of(_yaml_lines.node_lines(Path(source).read_text()), key_path)
    except (OSError, yaml.YAMLError):
        line = None
    dotted = ""
    for step in key_path:
        dotted += f"[{step}]" if isinstance(step, int) else (f".{step}" if dotted else str(step))
    return SweepError(f"{source}:{line}: {dotted}: {message}" if line else f"{source}: {dotted}: {message}")
