"""Embedding: model sources and loading, the forward pass, pooling and layer registries, static word
vectors, the lexical baseline, the user's own vectors, ONNX; imports only the ground floor."""

from harness._lazy import lazy_exports

# Re-exported on first use, so that importing one module of this package loads no other.
__getattr__, __all__ = lazy_exports(__name__, {
    "LAYER_SELECTIONS": "layers",
    "POOLINGS": "pooling",
    "loaded_encoder": "models",
    "resolve_model": "models",
})
