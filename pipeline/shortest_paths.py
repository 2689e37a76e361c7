"""Bounded single-source shortest-path trees and flows on them, compiled with Numba.

A pure calculation module. :func:`bounded_tree` grows the shortest-path tree of one source on
a CSR graph up to a distance limit (Dijkstra's method with an indexed binary heap: each node
at most once, moved up in place when a shorter path is found);
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
Mathematik 1, 269–271. Binary heap with decrease-key: Cormen, Leiserson, Rivest & Stein,
Introduction to Algorithms, 3rd ed. (2009), §6.5 and §24.3 (from memory).
Lam, Pitrou & Seibert (2015), "Numba: a LLVM-based Python JIT compiler", LLVM-HPC '15.
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = [
    "TreeWork",
    "bounded_tree",
    "compact_csr",
    "path_nodes",
    "reverse_csr",
    "root_tree_sums",
    "source_tree_sums",
    "tree_flows",
]


class TreeWork:
    """Work arrays for trees on a graph of ``n_nodes`` nodes.

    ``dist`` [m] is +inf and ``pred_entry`` −1 everywhere the last tree did not touch;
    ``order`` holds the settled nodes of the last tree, nearest first; ``flow`` is zero
    outside it.
    """

    def __init__(self, n_nodes: int):
        self.dist = np.full(n_nodes, np.inf)
        self.pred_node = np.full(n_nodes, -1, dtype=np.int64)
        self.pred_entry = np.full(n_nodes, -1, dtype=np.int64)
        self.order = np.zeros(n_nodes, dtype=np.int64)
        self.flow = np.zeros(n_nodes)
        self.touched = np.zeros(n_nodes, dtype=np.int64)
        self.no_targets = np.zeros(n_nodes, dtype=np.bool_)
        self.heap_d = np.zeros(n_nodes + 1)
        self.heap_v = np.zeros(n_nodes + 1, dtype=np.int64)
        self.pos = np.full(n_nodes, -1, dtype=np.int64)  # heap slot of each node, or −1
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


@njit(cache=True, nogil=True, inline="always")
def _before(da, va, db, vb):
    """Whether heap key (da, va) comes before (db, vb): by distance, then by node."""
    return da < db or (da == db and va < vb)


@njit(cache=True, nogil=True, inline="always")
def _put(heap_d, heap_v, pos, i, d, v):
    """Node v with key d into heap slot i."""
    heap_d[i] = d
    heap_v[i] = v
    pos[v] = i


@njit(cache=True, nogil=True, inline="always")
def _sift_up(heap_d, heap_v, pos, i, d, v):
    """Put node v with key d at heap slot i and move it up to its place."""
    while i > 0:
        p = (i - 1) >> 1
        if not _before(d, v, heap_d[p], heap_v[p]):
            break
        _put(heap_d, heap_v, pos, i, heap_d[p], heap_v[p])
        i = p
    _put(heap_d, heap_v, pos, i, d, v)


@njit(cache=True, nogil=True, inline="always")
def _sift_down(heap_d, heap_v, pos, hn, d, v):
    """Put node v with key d at the root of a heap of ``hn`` slots and move it down to its
    place (below the smaller child while that child's key is smaller)."""
    i = 0
    while True:
        c = 2 * i + 1
        if c >= hn:
            break
        if c + 1 < hn and _before(heap_d[c + 1], heap_v[c + 1], heap_d[c], heap_v[c]):
            c += 1
        if not _before(heap_d[c], heap_v[c], d, v):
            break
        _put(heap_d, heap_v, pos, i, heap_d[c], heap_v[c])
        i = c
    _put(heap_d, heap_v, pos, i, d, v)


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
    pos,
):
    """Settle the nodes within ``limit`` of ``source`` until every target node is settled;
    returns (settled, touched) counts (in ``order`` and ``touched``). The heap holds each
    touched, unsettled node once (``pos``: its slot), keyed by (distance, node): a shorter
    path moves it up in place."""
    left = n_targets
    dist[source] = 0.0
    touched[0] = source
    nt = 1
    heap_d[0] = 0.0
    heap_v[0] = source
    pos[source] = 0
    hn = 1
    k = 0
    while hn > 0:
        d = heap_d[0]
        x = heap_v[0]
        pos[x] = -2  # settled: never touched again (dist[x] <= every later distance)
        hn -= 1
        if hn > 0:  # the last leaf takes the root's slot and moves down
            _sift_down(heap_d, heap_v, pos, hn, heap_d[hn], heap_v[hn])
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
                i = hn
                hn += 1
            else:
                i = pos[y]
            dist[y] = nd
            pred_node[y] = x
            pred_entry[y] = e
            _sift_up(heap_d, heap_v, pos, i, nd, y)
    for i in range(nt):  # left as found, for the next tree
        pos[touched[i]] = -1
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
    indptr, indices : ndarray of int32 or int64
        CSR structure (entry e runs from its row to ``indices[e]``); int32 (see
        :func:`compact_csr`) halves the memory a tree walks.
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
        work.pos,
    )
    work.size = int(k)
    work.n_touched = int(nt)
    return work.size


def compact_csr(indptr: np.ndarray, indices: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The CSR structure as int32 where every number fits (else int64): the same graph in
    half the memory, which a tree reads node by node."""
    small = indptr.size <= np.iinfo(np.int32).max and (
        indptr.size == 0 or int(indptr[-1]) <= np.iinfo(np.int32).max
    )
    dt = np.int32 if small else np.int64
    return np.asarray(indptr, dtype=dt), np.asarray(indices, dtype=dt)


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


# ----------------------------------------------------------------------------------------------
# Trees rooted at a source: the corridor sums of one source's tree
# ----------------------------------------------------------------------------------------------


@njit(cache=True, nogil=True)
def _block_sum(a, lo, n):
    """Σ a[lo:lo+n] for n ≤ 128 in NumPy's order: one by one below 8, else eight
    accumulators over the multiples of eight, combined in pairs, then the rest."""
    if n < 8:
        res = 0.0
        for i in range(lo, lo + n):
            res += a[i]
        return res
    r0, r1, r2, r3 = a[lo], a[lo + 1], a[lo + 2], a[lo + 3]
    r4, r5, r6, r7 = a[lo + 4], a[lo + 5], a[lo + 6], a[lo + 7]
    i = lo + 8
    end8 = lo + n - n % 8
    while i < end8:
        r0 += a[i]
        r1 += a[i + 1]
        r2 += a[i + 2]
        r3 += a[i + 3]
        r4 += a[i + 4]
        r5 += a[i + 5]
        r6 += a[i + 6]
        r7 += a[i + 7]
        i += 8
    res = ((r0 + r1) + (r2 + r3)) + ((r4 + r5) + (r6 + r7))
    while i < lo + n:
        res += a[i]
        i += 1
    return res


@njit(cache=True, nogil=True)
def _pairwise_sum(a, lo, n):
    """Σ a[lo:lo+n] in NumPy's order (pairwise: halves at multiples of eight down to blocks of
    at most 128, :func:`_block_sum`), so a compiled sum has the bits of ``numpy.sum``.
    Higham (1993), "The accuracy of floating point summation", SIAM J. Sci. Comput. 14,
    783–799 (from memory); the block layout is NumPy's own. Written with an explicit stack:
    Numba's cache cannot reload a recursive function (the process crashes)."""
    if n <= 128:
        return _block_sum(a, lo, n)
    # tasks: (start, length, 0) = sum that range; (0, 0, 1) = add the last two sums
    t_lo = np.empty(192, dtype=np.int64)
    t_n = np.empty(192, dtype=np.int64)
    t_add = np.empty(192, dtype=np.bool_)
    vals = np.empty(96)
    nt, nv = 1, 0
    t_lo[0], t_n[0], t_add[0] = lo, n, False
    while nt > 0:
        nt -= 1
        if t_add[nt]:
            nv -= 1
            vals[nv - 1] = vals[nv - 1] + vals[nv]
        elif t_n[nt] <= 128:
            vals[nv] = _block_sum(a, t_lo[nt], t_n[nt])
            nv += 1
        else:
            s, m = t_lo[nt], t_n[nt]
            m2 = m // 2
            m2 -= m2 % 8
            t_add[nt] = True  # then add the two halves' sums, left + right
            t_lo[nt + 1], t_n[nt + 1], t_add[nt + 1] = s + m2, m - m2, False  # right second
            t_lo[nt + 2], t_n[nt + 2], t_add[nt + 2] = s, m2, False  # left first
            nt += 3
    return vals[0]


@njit(cache=True, nogil=True)
def _total(a, n):
    """``a[:n].sum()`` with NumPy's bits (the reduction starts from 0.0)."""
    return 0.0 + _pairwise_sum(a, 0, n)


@njit(cache=True, nogil=True)
def _tank_aki(grade, local_aki, mid_m, r_m, dilution):
    """Tank AKI [AKI] after ``mid_m`` [m] with top-ups: the share x = dilution·(1 − σ) of the
    tank is local fuel, σ = max(0, 1 − d/R) (``pipeline.corridors.tank_share``), blended
    linearly by volume as ``pipeline.octane.blend_linear`` does: (1 − x)·grade + x·local."""
    if not dilution > 0.0:
        return grade
    x = dilution * (1.0 - max(0.0, 1.0 - mid_m / r_m))
    x = min(max(x, 0.0), 1.0)
    return (1.0 - x) * grade + x * local_aki


@njit(cache=True, nogil=True)
def _source_tree_sums(
    order,
    k,
    pred_node,
    pred_entry,
    dist,
    flow,
    dest_node,
    dest_q,
    ent_len,
    req,
    local_aki,
    grade,
    cands,
    r_m,
    r_km,
    dilution,
    acc,
    out_cand,
):
    """The corridor sums of one source's tree (see :func:`source_tree_sums`)."""
    for i in range(dest_node.size):
        flow[dest_node[i]] += dest_q[i]
    _flows(order, k, pred_node, flow)
    delivered = flow[order[0]]
    # the tree's entries that carry flow, in the order of their head nodes
    n = 0
    heads = np.empty(max(k - 1, 0), dtype=np.int64)
    if 8 * k >= flow.size:  # a tree over much of the graph: one pass over the nodes
        settled = np.zeros(flow.size, dtype=np.bool_)
        for i in range(1, k):
            settled[order[i]] = True
        for y in range(flow.size):
            if settled[y] and flow[y] > 0.0:
                heads[n] = y
                n += 1
    else:
        for i in range(1, k):
            if flow[order[i]] > 0.0:
                heads[n] = order[i]
                n += 1
        heads[:n].sort()
    heads = heads[:n]
    n_b = req.shape[1]
    n_c = cands.size
    vd = np.empty(n)
    risk = np.empty(n)
    vd_in = np.empty(n)
    vd_cand = np.empty((n_c, n))
    gap = np.empty(n_b)
    for i in range(n):
        y = heads[i]
        e = pred_entry[y]
        a = dist[pred_node[y]]
        ell = ent_len[e]
        a2 = min(a, r_m)
        b2 = min(a + ell, r_m)
        share_m = (b2 - a2) - (b2 * b2 - a2 * a2) / (2.0 * r_m)
        f = flow[y]
        v = f * share_m / 1000.0
        mid = a + 0.5 * ell
        tank = _tank_aki(grade, local_aki[e], mid, r_m, dilution)
        cnt = 0
        for b in range(n_b):  # max(req − tank, 0); NaN stays NaN, as with numpy.maximum
            d = req[e, b] - tank
            gap[b] = d if d != d or d > 0.0 else 0.0
            if d > 0.0:
                cnt += 1
        deficit = _total(gap, n_b) / n_b
        vd[i] = v
        risk[i] = v * deficit / r_km
        vd_in[i] = v * (cnt / n_b)
        for c in range(n_c):
            if not cands[c] > grade:
                continue
            tank_c = _tank_aki(cands[c], local_aki[e], mid, r_m, dilution)
            cnt_c = 0
            for b in range(n_b):
                if req[e, b] > tank_c:
                    cnt_c += 1
            vd_cand[c, i] = v * (cnt_c / n_b)
        acc[e, 0] += f
        acc[e, 1] += v
        acc[e, 2] += risk[i]
        acc[e, 3] += f * mid
        acc[e, 4] += v * tank
        acc[e, 5] += v * deficit
        acc[e, 6] += 1.0
    for c in range(n_c):
        out_cand[c] = _total(vd_cand[c], n) if cands[c] > grade else np.nan
    return delivered, _total(risk, n), _total(vd, n), _total(vd_in, n)


def source_tree_sums(
    work: TreeWork,
    dest_node: np.ndarray,
    dest_q: np.ndarray,
    length_m: np.ndarray,
    req: np.ndarray,
    local_aki: np.ndarray,
    grade: float,
    cands: np.ndarray,
    range_m: float,
    range_km: float,
    dilution: float,
    acc: np.ndarray,
    out_cand: np.ndarray,
) -> tuple[float, float, float, float]:
    """Adds the last tree of ``work`` (rooted at a source) to the corridor sums (in place).

    The source sends ``dest_q[i]`` [L/month] to node ``dest_node[i]`` (repeats add up) with
    tank grade ``grade`` [AKI]. The demand is summed over every subtree into ``work.flow``
    (the flow on the tree entry into each node). Each entry carrying flow, in the order of
    its head node: its volume-distance vd = flow ∫ σ [L·km/month] over the entry with
    σ(y) = max(0, 1 − y/R); the tank AKI at its midpoint (blended towards ``local_aki`` with
    ``dilution`` > 0); its deficit, the mean over the requirement bins ``req[e]`` [AKI] of
    max(req − tank, 0); and its risk vd·deficit/R [L·AKI/month]. Adds ``acc`` rows (flow, vd,
    risk, flow·midpoint distance, vd·tank AKI, vd·deficit, 1; the corridor module's fields)
    to row e of ``acc`` (shape (entries, 7): an entry's sums share a cache line) and writes,
    per candidate grade above ``grade``, the volume-distance in deficit to ``out_cand`` (NaN
    for the others).

    Returns (delivered, export risk, volume-distance, volume-distance in deficit). Every
    sum is added in NumPy's pairwise order, so the results have the bits of the same sums
    taken with NumPy arrays.

    Raises
    ------
    ValueError
        If ``req``, ``local_aki``, ``acc`` or ``out_cand`` do not match the entries and
        candidates (the compiled code does not check its indices).
    """
    n_ent = length_m.shape[0]
    cands = np.asarray(cands, dtype=float)
    if (
        req.ndim != 2
        or req.shape[0] != n_ent
        or local_aki.shape != (n_ent,)
        or acc.shape != (n_ent, 7)
        or out_cand.shape != cands.shape
    ):
        raise ValueError(
            f"source_tree_sums: {n_ent} entries and {cands.size} candidates, but req "
            f"{req.shape}, local_aki {local_aki.shape}, acc {acc.shape}, out_cand "
            f"{out_cand.shape}"
        )
    return _source_tree_sums(
        work.order,
        work.size,
        work.pred_node,
        work.pred_entry,
        work.dist,
        work.flow,
        np.asarray(dest_node, dtype=np.int64),
        np.asarray(dest_q, dtype=float),
        length_m,
        req,
        local_aki,
        float(grade),
        cands,
        float(range_m),
        float(range_km),
        float(dilution),
        acc,
        out_cand,
    )
