"""harness.metrics._dbcv against the hdbscan package's validity_index, the reference implementation of DBCV
(Moulavi et al. 2014) that the tool's figure has always been defined by.

The rule checked: the vectorised index equals the reference exactly (same distances, core distances, spanning
tree and tie rule) on every case of a grid of cluster counts, dimensions, noise shares and tied distances, and it
fails (SpanningTreeAmbiguous) exactly where the reference fails its assertion.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from hdbscan.validity import validity_index as reference_index
from sklearn.datasets import make_blobs

from harness.metrics import _dbcv
from harness.metrics._dbcv import SpanningTreeAmbiguous, validity_index


def _reference(points, labels):
    try:
        return reference_index(points, labels)
    except AssertionError:
        return "fails"


def _ours(points, labels):
    try:
        return validity_index(points, labels)
    except SpanningTreeAmbiguous:
        return "fails"


def _case(k: int, dimension: int, noise: float, tied: bool, n: int = 400):
    points, labels = make_blobs(n, n_features=dimension, centers=k, cluster_std=2.0, random_state=k * 100 + dimension)
    if tied:  # points on an integer grid: many equal distances, so tied mutual reachability distances
        points = np.round(points)
    labels = labels.copy()
    labels[np.random.default_rng(k + dimension).random(n) < noise] = -1
    return points.astype(np.float64), labels


GRID = list(itertools.product((2, 3, 6, 10), (2, 5, 10, 40), (0.0, 0.2), (False, True)))


@pytest.mark.parametrize("k,dimension,noise,tied", GRID)
def test_the_index_equals_the_hdbscan_package_on_every_case(k, dimension, noise, tied):
    points, labels = _case(k, dimension, noise, tied)
    assert _ours(points, labels) == _reference(points, labels)


def test_the_tie_rule_matters_so_the_comparison_can_fail():
    # Taking the spanning tree's own sources as parents (no tie rule) gives other internal vertices, and another
    # index, on most of the grid: the equality above is not automatic.
    differing = 0
    for k, dimension, noise, tied in GRID[::4]:
        points, labels = _case(k, dimension, noise, tied)
        original = _dbcv._tree_parents
        try:
            _dbcv._tree_parents = lambda reachability, tree: tree[:, 0]
            without_rule = validity_index(points, labels)
        finally:
            _dbcv._tree_parents = original
        differing += without_rule != validity_index(points, labels)
    assert differing >= len(GRID[::4]) // 2


def test_a_cluster_larger_than_one_block_of_the_parent_search():
    # A cluster of about 2,500 points: its parent search runs over three blocks of rows.
    points, labels = make_blobs([2500, 300], n_features=3, cluster_std=[1.0, 3.0], random_state=3)
    labels[:100] = -1
    assert np.bincount(labels[labels >= 0]).max() > 2 * _dbcv._BLOCK_ROWS
    assert _ours(np.round(points, 1), labels) == _reference(np.round(points, 1), labels)


@pytest.mark.parametrize("sizes", [(2, 2), (2, 50), (3, 3, 40), (2, 3, 30, 30)])
def test_tiny_clusters(sizes):
    # Clusters of two or three points: trees with no internal vertex (all edges count) or a single one (a
    # one-point cluster never reaches the index: density_validity returns NaN for it first).
    rng = np.random.default_rng(len(sizes))
    points = np.vstack([rng.normal(10 * i, 1, (size, 4)) for i, size in enumerate(sizes)])
    labels = np.repeat(np.arange(len(sizes)), sizes)
    assert _ours(points, labels) == _reference(points, labels)


def test_empty_cluster_ids_are_skipped_like_the_reference():
    points, labels = _case(3, 5, 0.0, False)
    labels = np.where(labels == 1, 3, labels)  # id 1 unused, ids 0, 2, 3 present
    assert _ours(points, labels) == _reference(points, labels)


@pytest.mark.parametrize("seed", range(3))
def test_it_fails_where_the_reference_fails(seed):
    # Every vector twice, both copies in one cluster: the hdbscan package fails its spanning-tree assertion.
    rng = np.random.default_rng(seed)
    base = rng.normal(size=(80, 384)).astype(np.float32) * 10
    points, labels = np.vstack([base, base]).astype(np.float64), np.tile(rng.integers(0, 3, 80), 2)
    assert _reference(points, labels) == "fails"
    assert _ours(points, labels) == "fails"
