"""Cluster tree: permutation, partition, balance and depth (expected values from the
definition: median bisection of n points into 2^L ranges, L = ceil(log2(n / leaf)))."""

import math

import numpy as np
import pytest

from harness.geometry.pointsets import clustered, sorted_1d, uniform
from harness.geometry.tree import TreeError, build_tree, tree_depth


def _point_sets():
    rng = np.random.default_rng(7)
    return {
        "uniform_1d": uniform(3000, 1, rng=rng),
        "sorted_1d": sorted_1d(2500, irregular=True, rng=rng),
        "uniform_2d": uniform(5000, 2, rng=rng),
        "clustered_2d": clustered(4097, 2, rng=rng),
        "uniform_3d": uniform(3333, 3, rng=rng),
        "clustered_3d": clustered(2049, 3, rng=rng),
        "duplicates": np.repeat(rng.random((10, 2)), 130, axis=0),
        "all_equal": np.zeros((1000, 2)),
    }


POINT_SETS = _point_sets()


@pytest.mark.parametrize("name", sorted(POINT_SETS))
@pytest.mark.parametrize("leaf", [2, 50, 128])
def test_tree_structure(name: str, leaf: int) -> None:
    points = POINT_SETS[name]
    n = points.shape[0]
    tree = build_tree(points, leaf_size=leaf)
    # a permutation of 0..n-1
    assert np.array_equal(np.sort(tree.perm), np.arange(n))
    # depth = ceil(log2(n / leaf)) (0 when n <= leaf)
    expected_depth = max(0, math.ceil(math.log2(n / leaf))) if n > leaf else 0
    assert tree.depth == expected_depth
    assert tree.sizes(tree.depth).max() <= leaf
    for level in range(tree.depth + 1):
        b = tree.bounds[level]
        assert b.shape == ((1 << level) + 1,)
        assert b[0] == 0 and b[-1] == n
        sizes = np.diff(b)
        assert sizes.min() >= 1, f"empty node at level {level}"
        assert sizes.max() - sizes.min() <= 1, f"level {level}: {sizes.min()}..{sizes.max()}"
        if level < tree.depth:
            # the children of node j are nodes 2j and 2j+1 of the next level: same range
            child = tree.bounds[level + 1]
            assert np.array_equal(child[::2], b)


def test_split_is_geometric() -> None:
    # 1D points: each leaf must be an interval of the sorted coordinates
    rng = np.random.default_rng(3)
    x = rng.random(1000)
    tree = build_tree(x, leaf_size=64)
    xs = x[tree.perm]
    b = tree.bounds[tree.depth]
    for j in range(b.shape[0] - 2):
        assert xs[b[j]:b[j + 1]].max() <= xs[b[j + 1]:b[j + 2]].min() or \
            xs[b[j]:b[j + 1]].min() >= xs[b[j + 1]:b[j + 2]].max()
    # iperm inverts perm
    assert np.array_equal(tree.iperm[tree.perm], np.arange(1000))


def test_depth_function_and_small_inputs() -> None:
    assert tree_depth(128, 128) == 0
    assert tree_depth(129, 128) == 1
    assert tree_depth(16000, 128) == 7
    tree = build_tree(np.zeros((1, 3)), leaf_size=128)
    assert tree.depth == 0 and tree.node(0, 0) == (0, 1)


@pytest.mark.parametrize("bad", [0, 1, -3, 2.5])
def test_bad_leaf_size(bad: float) -> None:
    with pytest.raises(TreeError, match="leaf_size"):
        build_tree(np.zeros((10, 2)), leaf_size=bad)


def test_bad_points() -> None:
    with pytest.raises(TreeError, match="finite"):
        build_tree(np.array([[0.0, np.nan]]))
    with pytest.raises(TreeError, match="shape"):
        build_tree(np.zeros((0, 2)))
