"""Static figures (matplotlib, headless)."""

from __future__ import annotations

import numpy as np


def token_counts_by_cluster_figure(token_counts: np.ndarray, clusters: np.ndarray, title: str = ""):
    """Box plot of token counts per cluster, clusters ordered by median length, noise in grey."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    ids = np.unique(clusters)
    medians = {c: np.median(token_counts[clusters == c]) for c in ids}
    ordered = sorted(ids, key=lambda c: (c == -1, medians[c]))
    figure, axes = plt.subplots(figsize=(max(6, 0.35 * len(ordered) + 2), 4), dpi=100)
    boxes = axes.boxplot([token_counts[clusters == c] for c in ordered], patch_artist=True, showfliers=False)
    for patch, cluster in zip(boxes["boxes"], ordered):
        patch.set_facecolor("#bbbbbb" if cluster == -1 else "#6a9fd4")
    axes.set_xticks(range(1, len(ordered) + 1), ["noise" if c == -1 else str(c) for c in ordered], rotation=90)
    axes.set_yscale("log")
    axes.set_xlabel("cluster (ordered by median length)")
    axes.set_ylabel("tokens per text (log scale)")
    axes.set_title(title, fontsize=9)
    figure.tight_layout()
    return figure
