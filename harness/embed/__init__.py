"""Embedding: model sources and loading, the forward pass, pooling and layer registries, static word
vectors, the lexical baseline, the user's own vectors, ONNX; imports only the ground floor."""

from importlib import import_module

# Re-exported on first use, so that importing one module of this package loads no other.
_EXPORTS = {
    "LAYER_SELECTIONS": "layers",
    "POOLINGS": "pooling",
    "loaded_encoder": "models",
    "resolve_model": "models",
}
__all__ = sorted(_EXPORTS)


def __getattr__(name: str):
    if name in _EXPORTS:
        return getattr(import_module(f"{__name__}.{_EXPORTS[name]}"), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
