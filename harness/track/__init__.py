"""Everything that writes to or reads from MLflow: runs, params, metrics and artifacts, what the UI
opens on, and a finished sweep read back."""

from harness._lazy import lazy_exports

# Re-exported on first use, so that importing one module of this package loads no other.
__getattr__, __all__ = lazy_exports(__name__, {
    "SweepTracker": "tracking",
    "sweep_record": "readback",
})
