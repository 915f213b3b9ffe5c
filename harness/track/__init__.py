"""Everything that writes to or reads from MLflow: runs, params, metrics and artifacts, what the UI
opens on, and a finished sweep read back."""

from importlib import import_module

# Re-exported on first use, so that importing one module of this package loads no other.
_EXPORTS = {
    "SweepTracker": "tracking",
    "sweep_record": "readback",
}
__all__ = sorted(_EXPORTS)


def __getattr__(name: str):
    if name in _EXPORTS:
        return getattr(import_module(f"{__name__}.{_EXPORTS[name]}"), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
