"""From a clustering to numbers and a ranking: scores of one clustering, bootstrap evidence, cluster
descriptions, the leaderboard and the verdict across datasets (the metrics are in harness.metrics)."""

from harness._lazy import lazy_exports

# Re-exported on first use, so that importing one module of this package loads no other.
__getattr__, __all__ = lazy_exports(__name__, {
    "configuration_evidence": "evidence",
    "rank_configurations": "leaderboard",
    "trial_scores": "scoring",
})
