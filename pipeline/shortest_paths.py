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

__all__ = [
    "TreeWork",
    "bounded_tree",
    "path_nodes",
    "reverse_csr",
    "root_tree_sums",
    "tree_flows",
]


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


# ----------------------------------------------------------------------------------------------
# Trees rooted at a destination (reverse graph): sums over every source's path in one pass
# ----------------------------------------------------------------------------------------------


def reverse_csr(
    indptr: np.ndarray, indices: np.ndarray, length_m: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """The transpose of a CSR graph, for trees grown towards a root (from every node to it).

    Returns (indptr, indices, length_m, entry): reverse entry i runs from its row h to
    ``indices[i]`` = t and stands for the forward entry ``entry[i]`` (t → h). Rows are
    sorted by t, so the transpose depends only on the forward graph's entries."""
    n = indptr.size - 1
    tails = np.repeat(np.arange(n, dtype=np.int64), np.diff(indptr))
    key = np.asarray(indices, dtype=np.int64) * max(n, 1) + tails
    perm = np.argsort(key, kind="stable").astype(np.int64)
    rindptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(indices, minlength=n), out=rindptr[1:])
    return rindptr, tails[perm], np.asarray(length_m, dtype=float)[perm], perm


@njit(cache=True, nogil=True)
def _mark_paths(pred_node, ends, mark):
    for i in range(ends.size):
        x = ends[i]
        while x >= 0 and not mark[x]:
            mark[x] = True
            x = pred_node[x]


def path_nodes(work: TreeWork, ends: np.ndarray, mark: np.ndarray) -> np.ndarray:
    """Nodes on the tree paths from the settled nodes ``ends`` to the last tree's root, in
    settling order (the root first; empty when ``ends`` is). ``mark`` is a caller-owned
    all-False bool array of the graph's size, left all False. Walking each path stops at the
    first node already marked, so the cost is the size of the union of the paths."""
    ends = np.asarray(ends, dtype=np.int64)
    if ends.size == 0:
        return np.zeros(0, dtype=np.int64)
    _mark_paths(work.pred_node, ends, mark)
    order = work.order[: work.size]
    nodes = order[mark[order]]
    mark[nodes] = False
    return nodes


@njit(cache=True, nogil=True)
def _root_tree_sums(
    parent,
    fent,
    dist,
    src_pos,
    src_q,
    src_grade,
    src_row,
    cand_ok,
    ent_len,
    req,
    grades,
    cands,
    r_m,
    acc,
    acc_bits,
    out_risk,
    out_vd,
    out_vd_def,
    out_vd_cand,
):
    """Sums of one root's tree over every source it serves (see :func:`root_tree_sums`)."""
    k = parent.size
    n_g = grades.size
    n_c = cands.size
    n_b = req.shape[1]
    n_w = acc_bits.shape[1]
    q_g = np.zeros((k, n_g))
    p_g = np.zeros((k, n_g))
    bits = np.zeros((k, n_w), dtype=np.uint64)
    for i in range(src_pos.size):
        x = src_pos[i]
        q_g[x, src_grade[i]] += src_q[i]
        p_g[x, src_grade[i]] += src_q[i] * dist[x]
        r = src_row[i]
        bits[x, r // 64] |= np.uint64(1) << np.uint64(r % 64)
    # subtree sums, farthest first (a node is settled after its parent)
    for x in range(k - 1, 0, -1):
        p = parent[x]
        for g in range(n_g):
            q_g[p, g] += q_g[x, g]
            p_g[p, g] += p_g[x, g]
        for w in range(n_w):
            bits[p, w] |= bits[x, w]
    # Only the nodes on some source's path carry flow: number them (a parent comes first).
    slot = np.full(k, -1, dtype=np.int64)
    slot[0] = 0
    n_on = 1
    for x in range(1, k):
        for g in range(n_g):
            if q_g[x, g] > 0.0:
                slot[x] = n_on
                n_on += 1
                break
    # per entry x -> parent(x) on a path: flows, volume-distance, risk; and root-path prefix
    # sums u = sum of l(1 - l/2R + D(x)/R) phi, v = sum of l phi from x to the root, for
    # phi = 1, deficit(g), in-deficit share(g) and in-deficit share(candidate c)
    n_phi = 1 + 2 * n_g + n_c
    pre_u = np.zeros((n_on, n_phi))
    pre_v = np.zeros((n_on, n_phi))
    phi = np.zeros(n_phi)
    for x in range(1, k):
        sx = slot[x]
        if sx < 0:
            continue
        sp = slot[parent[x]]
        e = fent[x]
        ell = ent_len[e]
        dx = dist[x]
        c_u = ell * (1.0 - ell / (2.0 * r_m) + dx / r_m)
        phi[0] = 1.0
        for g in range(n_g):
            s = 0.0
            cnt = 0
            for b in range(n_b):
                d = req[e, b] - grades[g]
                if d > 0.0:
                    s += d
                    cnt += 1
            phi[1 + g] = s / n_b
            phi[1 + n_g + g] = cnt / n_b
        for c in range(n_c):
            cnt = 0
            for b in range(n_b):
                if req[e, b] > cands[c]:
                    cnt += 1
            phi[1 + 2 * n_g + c] = cnt / n_b
        for f in range(n_phi):
            pre_u[sx, f] = pre_u[sp, f] + c_u * phi[f]
            pre_v[sx, f] = pre_v[sp, f] + ell * phi[f]
        q_tot = 0.0
        vd_sum = 0.0
        risk = 0.0
        vdaki = 0.0
        vddef = 0.0
        fdist = 0.0
        for g in range(n_g):
            if q_g[x, g] == 0.0:
                continue
            q_tot += q_g[x, g]
            vd = (c_u * q_g[x, g] - ell * p_g[x, g] / r_m) / 1000.0
            vd_sum += vd
            risk += vd * phi[1 + g]
            vdaki += vd * grades[g]
            vddef += vd * phi[1 + g]
            fdist += p_g[x, g] - q_g[x, g] * (dx - 0.5 * ell)
        acc[0, e] += q_tot
        acc[1, e] += vd_sum
        acc[2, e] += risk / (r_m / 1000.0)
        acc[3, e] += fdist
        acc[4, e] += vdaki
        acc[5, e] += vddef
        for w in range(n_w):
            acc_bits[e, w] |= bits[x, w]
    # per source: the integral over its path is u(s) - D(s)/R v(s)
    for i in range(src_pos.size):
        y = src_pos[i]
        x = slot[y]
        q = src_q[i]
        r = src_row[i]
        g = src_grade[i]
        dx = dist[y]
        out_vd[r] += q * (pre_u[x, 0] - dx / r_m * pre_v[x, 0]) / 1000.0
        f = 1 + g
        out_risk[r] += q * (pre_u[x, f] - dx / r_m * pre_v[x, f]) / 1000.0 / (r_m / 1000.0)
        f = 1 + n_g + g
        out_vd_def[r] += q * (pre_u[x, f] - dx / r_m * pre_v[x, f]) / 1000.0
        for c in range(n_c):
            if cand_ok[r, c]:
                f = 1 + 2 * n_g + c
                out_vd_cand[r, c] += q * (pre_u[x, f] - dx / r_m * pre_v[x, f]) / 1000.0


def root_tree_sums(
    parent: np.ndarray,
    entry: np.ndarray,
    dist_m: np.ndarray,
    src_pos: np.ndarray,
    src_q: np.ndarray,
    src_grade: np.ndarray,
    src_row: np.ndarray,
    cand_ok: np.ndarray,
    length_m: np.ndarray,
    req: np.ndarray,
    grades: np.ndarray,
    cands: np.ndarray,
    range_m: float,
    acc: np.ndarray,
    acc_bits: np.ndarray,
    out: dict[str, np.ndarray],
) -> None:
    """Adds one root's tree to the corridor sums of the sources it serves (in place).

    The tree is rooted at a destination and holds every node's shortest path *to* it, in
    settling order: position 0 is the root, ``parent[x]`` < x is the next node towards it,
    ``entry[x]`` the forward entry x → parent(x), ``dist_m[x]`` D(x) the road distance to the
    root [m]. Source i sits at position ``src_pos[i]`` and sends ``src_q[i]`` [L/month] to the
    root with tank grade ``grades[src_grade[i]]`` [AKI]; ``src_row[i]`` is its row in the
    per-source outputs and its bit in ``acc_bits``.

    On the entry into x the fuel from source s has driven a = D(s) − D(x); with
    σ(y) = 1 − y/R (every path ends within R) its volume-distance is
    q ℓ (1 − ℓ/2R + D(x)/R − D(s)/R) / 1000 [L·km/month]: linear in D(s), so each entry needs
    only the subtree sums Σq and Σq·D(s) per tank grade, and each source's sum over its path
    only the root-path prefix sums Σℓ(1 − ℓ/2R + D(x)/R)·φ and Σℓ·φ of each weight φ
    (1, deficit, share of the length in deficit). Adds ``acc`` rows (flow, vd, risk,
    flow·midpoint distance, vd·tank AKI, vd·deficit; the layout of the corridor module) and
    ORs the sources' bits into ``acc_bits``; adds ``out['export_risk']``, ``['vd_total']``,
    ``['vd_deficit']``, ``['vd_deficit_cand']`` (candidates where ``cand_ok``)."""
    _root_tree_sums(
        parent,
        entry,
        dist_m,
        src_pos,
        src_q,
        src_grade,
        src_row,
        cand_ok,
        length_m,
        req,
        grades,
        cands,
        float(range_m),
        acc,
        acc_bits,
        out["export_risk"],
        out["vd_total"],
        out["vd_deficit"],
        out["vd_deficit_cand"],
    )
