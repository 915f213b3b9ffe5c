"""What happens to the vectors: post-processing chains, reducers and clusterers, each a settings
class and a registry; imports only the ground floor."""

from harness._lazy import lazy_exports

# Re-exported on first use, so that importing one module of this package loads no other.
__getattr__, __all__ = lazy_exports(__name__, {
    "CLUSTERERS": "cluster",
    "REDUCERS": "reduce",
    "TRANSFORMS": "transforms",
})
