"""rigbase.graph.connected_groups against scipy.sparse.csgraph.connected_components (the
reference library's own graph search) on seeded random graphs, from empty to fully joined."""

from __future__ import annotations

import numpy as np
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from rigbase.graph import connected_groups


def test_groups_equal_scipy_connected_components() -> None:
    rng = np.random.default_rng(3)
    for n, m in [(1, 0), (5, 0), (10, 4), (30, 25), (50, 200), (40, 39)]:
        a = rng.integers(0, n, m)
        b = rng.integers(0, n, m)
        ours = connected_groups(range(n), zip(a.tolist(), b.tolist(), strict=True))
        graph = coo_matrix((np.ones(m), (a, b)), shape=(n, n))
        count, labels = connected_components(graph, directed=False)
        theirs = {frozenset(np.flatnonzero(labels == k).tolist()) for k in range(count)}
        assert {frozenset(g) for g in ours} == theirs, (n, m)
        assert sum(len(g) for g in ours) == n  # every node once


def test_a_node_named_only_by_a_part_is_a_node_too() -> None:
    groups = connected_groups(["COM"], [("V", "n1"), ("n1", "COM"), ("x", "y")])
    assert sorted(map(sorted, groups)) == [["COM", "V", "n1"], ["x", "y"]]
