"""DBCV, the density-based clustering validation index, with the hdbscan package's exact conventions, vectorised.

Moulavi, Jaskowiak, Campello, Zimek and Sander (2014), Density-Based Clustering Validation, SDM: each cluster's
all-points core distances, a minimum spanning tree of its mutual reachability distances, the tree's internal
edges and vertices, then density sparseness (the heaviest internal edge) against density separation (the
lightest mutual reachability distance between the internal vertices of two clusters).

The hdbscan package's ``validity_index`` is the reference (tests compare every figure with it): same distances,
same core distances, same spanning tree (its own Prim's routine), and the same choice among tied parents when it
rebuilds the tree's edges. That choice decides which vertices are internal, and mutual reachability distances tie
often (every distance below a point's core distance becomes that core distance). hdbscan makes it with a Python
loop over the tree's rows (an ``isclose`` and an ``intersect1d`` per point), which took most of a sweep's
label-free scoring; here it is one array comparison per block of rows.
"""

from __future__ import annotations

import numpy as np

# Rows of the parent search compared at once: bounds the (rows x cluster size) temporaries to ~100 MB at 5,000 points.
_BLOCK_ROWS = 1024


class SpanningTreeAmbiguous(ArithmeticError):
    """No earlier tree vertex lies at an edge's weight from the edge's new vertex (hdbscan asserts the same)."""


def _core_distances(distances: np.ndarray, dimension: int) -> np.ndarray:
    """All-points core distance of each point of a cluster (Moulavi et al. 2014, definition 1): the mean of the
    inverse distances to the other points, each raised to the dimension, to the power -1/dimension. Zero
    distances are left out of the mean's sum (but not of its count), as the hdbscan package does."""
    inverse = np.zeros_like(distances)
    # In place, element by element: the same divisions and powers as on the nonzero entries taken out, without
    # copying them out and back (0 ** dimension stays 0 where nothing was divided).
    np.divide(1.0, distances, out=inverse, where=distances != 0)
    inverse **= dimension
    result = inverse.sum(axis=1)
    result /= distances.shape[0] - 1
    if result.sum() == 0:
        return np.zeros(len(distances))
    result **= (-1.0 / dimension)
    return result


def _tree_parents(reachability: np.ndarray, tree: np.ndarray) -> np.ndarray:
    """The parent hdbscan's validity index gives each new vertex of the spanning tree: the lowest-numbered vertex
    already in the tree whose distance to it is ``np.isclose`` to the edge's weight."""
    n = reachability.shape[0]
    new_vertices = tree[:, 1].astype(np.intp)
    added_at = np.empty(n, dtype=np.intp)  # the step a vertex joins the tree: vertex 0 at 0, row r's at r + 1
    added_at[0] = 0
    added_at[new_vertices] = np.arange(1, n)
    parents = tree[:, 0].copy()  # row 0 keeps its source (hdbscan's loop starts at row 1)
    for start in range(1, n - 1, _BLOCK_ROWS):
        rows = np.arange(start, min(start + _BLOCK_ROWS, n - 1))
        close = np.isclose(reachability[new_vertices[rows]], tree[rows, 2][:, None])
        close &= added_at[None, :] <= rows[:, None]  # vertices in the tree before this row's vertex joins
        found = close.any(axis=1)
        if not found.all():
            raise SpanningTreeAmbiguous(f"no tree vertex at the weight of spanning-tree row {rows[~found][0]}")
        parents[rows] = close.argmax(axis=1)  # the first True: the lowest-numbered candidate
    return parents


def _internal_tree(reachability: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The internal vertices (degree above one) of a cluster's spanning tree and its internal edges (all edges where
    none is internal, as the authors' MATLAB code and the hdbscan package do)."""
    from hdbscan._hdbscan_linkage import mst_linkage_core

    tree = mst_linkage_core(reachability)
    tree[:, 0] = _tree_parents(reachability, tree)
    vertices = np.arange(reachability.shape[0])[np.bincount(tree.T[:2].flatten().astype(np.intp)) > 1]
    if not len(vertices):
        vertices = np.array([0])
    internal = np.prod(np.isin(tree.T[:2], vertices), axis=0).astype(bool)
    edges = tree[internal] if np.any(internal) else tree.copy()
    return vertices, edges


def validity_index(points: np.ndarray, labels: np.ndarray) -> float:
    """DBCV of ``labels`` (clusters 0..k-1, noise -1) on ``points`` with Euclidean distances; noise points count
    in the weights (each cluster weighs its share of all points) as in the hdbscan package.

    Raises SpanningTreeAmbiguous where the hdbscan package fails its spanning-tree assertion.
    """
    from scipy.spatial.distance import cdist
    from sklearn.metrics import pairwise_distances

    points = np.asarray(points, dtype=np.float64)
    dimension = points.shape[1]
    n_clusters = int(labels.max()) + 1
    members = [np.flatnonzero(labels == c) for c in range(n_clusters)]
    present = [c for c in range(n_clusters) if members[c].size]
    core, vertices, sparseness = {}, {}, {}
    for c in present:
        distances = pairwise_distances(points[members[c]], metric="euclidean")
        core[c] = _core_distances(distances, dimension)
        reachability = np.maximum(distances, np.maximum(core[c][None, :], core[c][:, None]))
        vertices[c], edges = _internal_tree(reachability)
        sparseness[c] = edges.T[2].max()
    separation = np.full((n_clusters, n_clusters), np.inf)
    for position, i in enumerate(present):
        for j in present[position + 1:]:
            distances = cdist(points[members[i]][vertices[i]], points[members[j]][vertices[j]], "euclidean")
            reachability = np.maximum(distances, np.maximum(core[i][vertices[i]][:, None], core[j][vertices[j]][None, :]))
            separation[i, j] = separation[j, i] = reachability.min()
    result = 0
    for i in present:
        nearest = separation[i].min()
        result += (members[i].size / float(points.shape[0])) * ((nearest - sparseness[i]) / max(nearest, sparseness[i]))
    return result
