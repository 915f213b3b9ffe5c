"""From a clustering to numbers and a ranking: scores of one clustering, bootstrap evidence, cluster
descriptions, the leaderboard and the verdict across datasets (the metrics are in harness.metrics)."""

from importlib import import_module

# Re-exported on first use, so that importing one module of this package loads no other.
_EXPORTS = {
    "configuration_evidence": "evidence",
    "rank_configurations": "leaderboard",
    "trial_scores": "scoring",
}
__all__ = sorted(_EXPORTS)


def __getattr__(name: str):
    if name in _EXPORTS:
        return getattr(import_module(f"{__name__}.{_EXPORTS[name]}"), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
