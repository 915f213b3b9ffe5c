"""Planning and running trials: the plan and its stage keys, the stage executor, the on-disk cache,
the run itself and the Dask executor."""

from importlib import import_module

# Re-exported on first use, so that importing one module of this package loads no other.
_EXPORTS = {
    "StageCache": "cache",
    "StageExecutor": "stages",
    "planned_trials": "plan",
    "run_sweep_file": "runner",
}
__all__ = sorted(_EXPORTS)


def __getattr__(name: str):
    if name in _EXPORTS:
        return getattr(import_module(f"{__name__}.{_EXPORTS[name]}"), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
