"""What happens to the vectors: post-processing chains, reducers and clusterers, each a settings
class and a registry; imports only the ground floor."""

from importlib import import_module

# Re-exported on first use, so that importing one module of this package loads no other.
_EXPORTS = {
    "CLUSTERERS": "cluster",
    "REDUCERS": "reduce",
    "TRANSFORMS": "transforms",
}
__all__ = sorted(_EXPORTS)


def __getattr__(name: str):
    if name in _EXPORTS:
        return getattr(import_module(f"{__name__}.{_EXPORTS[name]}"), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
