"""Bounded shortest-path trees and tree flows (pipeline.shortest_paths).

Outside references: scipy.sparse.csgraph.dijkstra with ``limit`` (distances and the set of
nodes reached) and networkx descendants (subtree sums). Graphs are random test graphs.
"""

from __future__ import annotations

import networkx as nx
import numpy as np
import pytest
from scipy import sparse
from scipy.sparse.csgraph import dijkstra

from pipeline.shortest_paths import (
    TreeWork,
    bounded_tree,
    path_nodes,
    reverse_csr,
    tree_flows,
)


def random_csr(seed: int, n: int = 400, m: int = 1600) -> sparse.csr_matrix:
    rng = np.random.default_rng(seed)
    u = rng.integers(0, n, m)
    v = rng.integers(0, n, m)
    keep = u != v
    a = sparse.coo_matrix((rng.uniform(10, 1000, keep.sum()), (u[keep], v[keep])), shape=(n, n))
    a = a.tocsr()
    a.sum_duplicates()
    a.sort_indices()
    return a


@pytest.mark.parametrize("seed", [1, 2, 3])
@pytest.mark.parametrize("limit", [np.inf, 1500.0])
def test_distances_and_reach_equal_scipy(seed, limit):
    a = random_csr(seed)
    work = TreeWork(a.shape[0], a.nnz)
    ip, ix = a.indptr.astype(np.int64), a.indices.astype(np.int64)
    for src in (0, 7, 399):
        ref = dijkstra(a, directed=True, indices=src, limit=limit)
        k = bounded_tree(ip, ix, a.data, src, limit, work)
        np.testing.assert_allclose(work.dist, ref, rtol=1e-12)
        assert k == np.isfinite(ref).sum()
        order = work.order[:k]
        assert np.all(np.diff(work.dist[order]) >= 0)  # settled nearest first
        # each predecessor entry is a real edge that closes the distance exactly
        x = order[1:]
        e = work.pred_entry[x]
        assert np.all(ix[e] == x)
        np.testing.assert_allclose(work.dist[work.pred_node[x]] + a.data[e], work.dist[x])


@pytest.mark.parametrize("seed", [1, 2])
def test_reverse_graph_trees_give_distances_to_the_root(seed):
    """A tree on reverse_csr gives every node's distance *to* the root: scipy's Dijkstra on
    the transposed matrix; each reverse entry stands for a forward entry of the same length."""
    a = random_csr(seed)
    ip, ix = a.indptr.astype(np.int64), a.indices.astype(np.int64)
    rip, rix, rlen, ent = reverse_csr(ip, ix, a.data)
    np.testing.assert_array_equal(rlen, a.data[ent])
    t = a.T.tocsr()
    t.sort_indices()
    np.testing.assert_array_equal(rip, t.indptr)
    np.testing.assert_array_equal(rix, t.indices)
    tails = np.repeat(np.arange(a.shape[0]), np.diff(ip))
    heads = np.repeat(np.arange(a.shape[0]), np.diff(rip))
    np.testing.assert_array_equal(ix[ent], heads)  # forward entry runs tail -> row
    np.testing.assert_array_equal(tails[ent], rix)
    work = TreeWork(a.shape[0], a.nnz)
    for root in (0, 5, 300):
        ref = dijkstra(a, directed=True, indices=root, limit=2000.0)
        ref_to = dijkstra(t, directed=True, indices=root, limit=2000.0)
        k = bounded_tree(rip, rix, rlen, root, 2000.0, work)
        np.testing.assert_allclose(work.dist, ref_to, rtol=1e-12)
        assert k == np.isfinite(ref_to).sum()
        assert not np.array_equal(np.isfinite(ref), np.isfinite(ref_to))  # really directed


def test_path_nodes_are_the_union_of_the_walked_paths_in_settling_order():
    """Reference: each end's path walked predecessor by predecessor in Python."""
    a = random_csr(4)
    work = TreeWork(a.shape[0], a.nnz)
    k = bounded_tree(a.indptr.astype(np.int64), a.indices.astype(np.int64), a.data, 3, 2500.0, work)
    order = work.order[:k]
    rng = np.random.default_rng(0)
    mark = np.zeros(a.shape[0], dtype=bool)
    for n_ends in (1, 5, 40):
        ends = rng.choice(order, n_ends, replace=False)
        want = set()
        for x in ends:
            while x >= 0:
                want.add(int(x))
                x = work.pred_node[x]
        got = path_nodes(work, ends, mark)
        assert set(got.tolist()) == want and got.size == len(want)
        rank = np.empty(a.shape[0], dtype=np.int64)
        rank[order] = np.arange(k)
        assert np.all(np.diff(rank[got]) > 0) and got[0] == 3  # settling order, root first
        assert not mark.any()
    assert path_nodes(work, np.zeros(0, dtype=np.int64), mark).size == 0


def test_work_arrays_are_reset_between_trees():
    a = random_csr(4)
    work = TreeWork(a.shape[0], a.nnz)
    ip, ix = a.indptr.astype(np.int64), a.indices.astype(np.int64)
    bounded_tree(ip, ix, a.data, 3, np.inf, work)
    k = bounded_tree(ip, ix, a.data, 5, 800.0, work)
    ref = dijkstra(a, indices=5, limit=800.0)
    np.testing.assert_allclose(work.dist, ref)
    assert np.isfinite(work.dist).sum() == k
    assert (work.flow == 0).all()


def test_tree_flows_equal_networkx_subtree_sums():
    a = random_csr(6)
    work = TreeWork(a.shape[0], a.nnz)
    ip, ix = a.indptr.astype(np.int64), a.indices.astype(np.int64)
    k = bounded_tree(ip, ix, a.data, 0, np.inf, work)
    rng = np.random.default_rng(0)
    order = work.order[:k].copy()
    demand = np.zeros(a.shape[0])
    demand[order] = rng.uniform(0, 5, k)
    work.flow[:] = demand
    flows = tree_flows(work).copy()
    tree = nx.DiGraph()
    tree.add_edges_from((int(work.pred_node[x]), int(x)) for x in order[1:])
    for x in order[::17]:
        expect = demand[x] + sum(demand[y] for y in nx.descendants(tree, int(x)))
        assert flows[x] == pytest.approx(expect, rel=1e-12)


def test_stopping_at_the_targets_keeps_their_distances_and_paths():
    a = random_csr(7)
    ip, ix = a.indptr.astype(np.int64), a.indices.astype(np.int64)
    full = TreeWork(a.shape[0], a.nnz)
    part = TreeWork(a.shape[0], a.nnz)
    k_full = bounded_tree(ip, ix, a.data, 0, np.inf, full)
    near = full.order[1:40]  # the 39 nearest nodes
    targets = np.zeros(a.shape[0], dtype=bool)
    targets[near] = True
    k = bounded_tree(ip, ix, a.data, 0, np.inf, part, targets)
    assert k == 40 < k_full  # stopped at the last target
    ref = dijkstra(a, indices=0)  # scipy on the whole graph
    np.testing.assert_allclose(part.dist[near], ref[near], rtol=1e-12)
    for x in near:  # the path to each target is the full tree's path
        y = x
        while y != 0:
            assert part.pred_node[y] == full.pred_node[y]
            y = part.pred_node[y]
