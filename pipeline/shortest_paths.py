"""Bounded single-source shortest-path trees and flows on them, compiled with Numba.

A pure calculation module. :func:`bounded_tree` grows the shortest-path tree of one source on
a CSR graph up to a distance limit (Dijkstra's method with a binary heap and lazy deletion);
:func:`tree_flows` sums the demand of every node's subtree in one pass over the nodes in
reverse settling order. Both work on caller-owned work arrays that are reset only where they
were touched, so a tree costs time in proportion to the nodes it reaches, not to the graph.

Ties between equal tentative distances are broken by node number, and an edge replaces a
node's predecessor only when it is strictly shorter: the tree depends only on the graph's
entries and their order, so a subgraph that keeps its nodes and entries in the same order
gives the same tree.

References
----------
Dijkstra, E. W. (1959), "A note on two problems in connexion with graphs", Numerische
Mathematik 1, 269–271. Binary heap with lazy deletion: Cormen, Leiserson, Rivest & Stein,
Introduction to Algorithms, 3rd ed. (2009), §6.5 and §24.3 (from memory).
Lam, Pitrou & Seibert (2015), "Numba: a LLVM-based Python JIT compiler", LLVM-HPC '15.
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["TreeWork", "bounded_tree", "tree_flows"]


class TreeWork:
    """Work arrays for trees on a graph of ``n_nodes`` nodes and ``n_entries`` entries.

    ``dist`` [m] is +inf and ``pred_entry`` −1 everywhere the last tree did not touch;
    ``order`` holds the settled nodes of the last tree, nearest first; ``flow`` is zero
    outside it.
    """

    def __init__(self, n_nodes: int, n_entries: int):
        self.dist = np.full(n_nodes, np.inf)
        self.pred_node = np.full(n_nodes, -1, dtype=np.int64)
        self.pred_entry = np.full(n_nodes, -1, dtype=np.int64)
        self.order = np.zeros(n_nodes, dtype=np.int64)
        self.flow = np.zeros(n_nodes)
        self.touched = np.zeros(n_nodes, dtype=np.int64)
        self.no_targets = np.zeros(n_nodes, dtype=np.bool_)
        self.heap_d = np.zeros(n_entries + 1)
        self.heap_v = np.zeros(n_entries + 1, dtype=np.int64)
        self.size = 0  # nodes settled in the last tree
        self.n_touched = 0  # nodes given a tentative distance in the last tree

    def reset(self) -> None:
        """Clear what the last tree touched."""
        _reset(
            self.touched,
            self.n_touched,
            self.dist,
            self.pred_node,
            self.pred_entry,
            self.flow,
        )
        self.size = 0
        self.n_touched = 0


@njit(cache=True, nogil=True)
def _reset(touched, k, dist, pred_node, pred_entry, flow):
    for i in range(k):
        x = touched[i]
        dist[x] = np.inf
        pred_node[x] = -1
        pred_entry[x] = -1
        flow[x] = 0.0


@njit(cache=True, nogil=True)
def _less(da, va, db, vb):
    return da < db or (da == db and va < vb)


@njit(cache=True, nogil=True)
def _dijkstra(
    indptr,
    indices,
    length,
    source,
    limit,
    target,
    n_targets,
    dist,
    pred_node,
    pred_entry,
    order,
    touched,
    heap_d,
    heap_v,
):
    """Settle the nodes within ``limit`` of ``source`` until every target node is settled;
    returns (settled, touched) counts (in ``order`` and ``touched``)."""
    left = n_targets
    dist[source] = 0.0
    touched[0] = source
    nt = 1
    heap_d[0] = 0.0
    heap_v[0] = source
    hn = 1
    k = 0
    while hn > 0:
        d = heap_d[0]
        x = heap_v[0]
        # pop the root
        hn -= 1
        if hn > 0:
            ld = heap_d[hn]
            lv = heap_v[hn]
            i = 0
            while True:
                c = 2 * i + 1
                if c >= hn:
                    break
                if c + 1 < hn and _less(heap_d[c + 1], heap_v[c + 1], heap_d[c], heap_v[c]):
                    c += 1
                if _less(heap_d[c], heap_v[c], ld, lv):
                    heap_d[i] = heap_d[c]
                    heap_v[i] = heap_v[c]
                    i = c
                else:
                    break
            heap_d[i] = ld
            heap_v[i] = lv
        if d > dist[x]:
            continue  # a stale heap entry (a node is pushed again only when strictly closer)
        order[k] = x
        k += 1
        if target[x]:
            left -= 1
            if left == 0:
                break  # every target is settled: the paths to them are final
        for e in range(indptr[x], indptr[x + 1]):
            y = indices[e]
            nd = d + length[e]  # a settled y has dist[y] <= d <= nd: never updated below
            if nd > limit or nd >= dist[y]:
                continue
            if dist[y] == np.inf:
                touched[nt] = y
                nt += 1
            dist[y] = nd
            pred_node[y] = x
            pred_entry[y] = e
            # push (nd, y)
            i = hn
            hn += 1
            while i > 0:
                p = (i - 1) // 2
                if _less(nd, y, heap_d[p], heap_v[p]):
                    heap_d[i] = heap_d[p]
                    heap_v[i] = heap_v[p]
                    i = p
                else:
                    break
            heap_d[i] = nd
            heap_v[i] = y
    return k, nt


@njit(cache=True, nogil=True)
def _flows(order, k, pred_node, flow):
    for i in range(k - 1, 0, -1):
        x = order[i]
        flow[pred_node[x]] += flow[x]


def bounded_tree(
    indptr: np.ndarray,
    indices: np.ndarray,
    length_m: np.ndarray,
    source: int,
    limit_m: float,
    work: TreeWork,
    targets: np.ndarray | None = None,
) -> int:
    """Shortest-path tree of ``source`` up to ``limit_m`` [m] on a CSR graph.

    Parameters
    ----------
    indptr, indices : ndarray of int64
        CSR structure (entry e runs from its row to ``indices[e]``).
    length_m : ndarray of float
        Entry lengths [m], ≥ 0.
    source : int
    limit_m : float
        Nodes farther than this [m] are not reached.
    work : TreeWork
        Reset first; on return holds ``dist`` [m], ``pred_node``, ``pred_entry`` (the entry
        into each settled node; −1 at the source) and ``order`` (settled nodes, nearest
        first).
    targets : ndarray of bool (n_nodes,), optional
        Stop as soon as every target node is settled: the tree then holds the final shortest
        paths to all of them (a settled node's path never changes). Without targets, or when
        a target lies beyond the limit, every node within the limit is settled.

    Returns
    -------
    int: the number of nodes settled (the source included). ``dist`` of a node touched but
    not settled (only possible with ``targets``) is an upper bound, not its distance.
    """
    work.reset()
    if targets is None:
        mask, n_targets = work.no_targets, -1
    else:
        mask = np.asarray(targets, dtype=np.bool_)
        n_targets = int(np.count_nonzero(mask))
        if n_targets == 0:
            n_targets = -1
    k, nt = _dijkstra(
        indptr,
        indices,
        length_m,
        int(source),
        float(limit_m),
        mask,
        n_targets,
        work.dist,
        work.pred_node,
        work.pred_entry,
        work.order,
        work.touched,
        work.heap_d,
        work.heap_v,
    )
    work.size = int(k)
    work.n_touched = int(nt)
    return work.size


def tree_flows(work: TreeWork) -> np.ndarray:
    """Subtree sums of ``work.flow`` over the last tree, in place: on entry ``flow[x]`` is the
    demand at x; on return it is the demand of x's whole subtree — the flow on the tree edge
    into x. One pass over the nodes from the farthest to the source (each node is settled
    after its predecessor). Returns ``work.flow``."""
    _flows(work.order, work.size, work.pred_node, work.flow)
    return work.flow
