"""Static figures (matplotlib, headless)."""

from __future__ import annotations

import numpy as np


def pyplot():
    """matplotlib's pyplot on the headless Agg backend."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def draw_token_counts_by_cluster(axes, token_counts: np.ndarray, clusters: np.ndarray, title: str = "") -> None:
    ids = np.unique(clusters)
    medians = {c: np.median(token_counts[clusters == c]) for c in ids}
    ordered = sorted(ids, key=lambda c: (c == -1, medians[c]))
    boxes = axes.boxplot([token_counts[clusters == c] for c in ordered], patch_artist=True, showfliers=False)
    for patch, cluster in zip(boxes["boxes"], ordered):
        patch.set_facecolor("#bbbbbb" if cluster == -1 else "#6a9fd4")
    axes.set_xticks(range(1, len(ordered) + 1), ["noise" if c == -1 else str(c) for c in ordered], rotation=90)
    axes.set_yscale("log")
    axes.set_xlabel("cluster (ordered by median length)")
    axes.set_ylabel("tokens per text (log scale)")
    axes.set_title(title, fontsize=9)
