"""Planning and running trials: the plan and its stage keys, the stage executor, the on-disk cache,
the run itself and the Dask executor."""

from harness._lazy import lazy_exports

# Re-exported on first use, so that importing one module of this package loads no other.
__getattr__, __all__ = lazy_exports(__name__, {
    "StageCache": "cache",
    "StageExecutor": "stages",
    "planned_trials": "plan",
    "run_sweep_file": "runner",
})
