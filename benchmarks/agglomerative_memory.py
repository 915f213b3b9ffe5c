"""Peak memory of agglomerative clustering at a few sizes: the figures behind AGGLOMERATIVE_MAX_TEXTS.

    python benchmarks/agglomerative_memory.py 2000,5000,10000,20000

Each fit runs in a fresh process (peak RSS only grows), on random 5-d vectors (the shape of a UMAP output), with
scikit-learn's AgglomerativeClustering. Prints, per size and linkage, the peak RSS added by the fit, the size of the
condensed distance matrix (n(n-1)/2 float64) and the seconds taken.
"""

from __future__ import annotations

import subprocess
import sys

CHILD = r"""
import resource, sys, time
import numpy as np
from sklearn.cluster import AgglomerativeClustering
n, linkage, metric = int(sys.argv[1]), sys.argv[2], sys.argv[3]
vectors = np.random.default_rng(0).normal(size=(n, 5)).astype(np.float32)
before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
started = time.perf_counter()
AgglomerativeClustering(n_clusters=20, linkage=linkage, metric=metric).fit(vectors)
print((resource.getrusage(resource.RUSAGE_SELF).ru_maxrss - before) / 1024, time.perf_counter() - started)
"""
SETTINGS = (("ward", "euclidean"), ("average", "cosine"), ("complete", "euclidean"), ("single", "euclidean"))


def main(sizes: str) -> int:
    print(f"{'texts':>7} {'linkage':<9} {'metric':<10} {'peak MB':>8} {'distances MB':>13} {'seconds':>8}")
    for n in (int(s) for s in sizes.split(",")):
        for linkage, metric in SETTINGS:
            done = subprocess.run([sys.executable, "-c", CHILD, str(n), linkage, metric], capture_output=True, text=True)
            if done.returncode != 0:
                print(f"{n:>7} {linkage:<9} {metric:<10} failed: {done.stderr.strip().splitlines()[-1]}")
                continue
            peak_mb, seconds = map(float, done.stdout.split())
            print(f"{n:>7} {linkage:<9} {metric:<10} {peak_mb:>8.0f} {n * (n - 1) / 2 * 8 / 2**20:>13.0f} {seconds:>8.1f}")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1] if len(sys.argv) > 1 else "2000,5000,10000"))
