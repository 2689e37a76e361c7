"""Least-cost routes over a slope-penalised cost surface derived from a DEM.

A pure calculation module (it never opens files): given an elevation grid, its affine
transform and a list of endpoints, it lays out a road-like network that climbs gently,
avoids nodata (water, voids) and merges onto routes it has already built rather than
drawing parallel lines. The demo generator uses it to invent a road network; the same code
serves as the "no road file" fallback travel network.

Preconditions
-------------
* The elevation grid and the endpoints are in the same metric, projected CRS (metres).
  The module never looks at the CRS; it only assumes the transform's units are metres.
* The transform is north-up (no rotation or shear).

Method, in order
----------------
1. If the grid is larger than ``max_grid_cells`` along a side, it is block-averaged by an
   integer factor (any nodata cell inside a block makes the block nodata).
2. Grade ``g`` = magnitude of the elevation gradient on that routing grid (central
   differences, rise/run, dimensionless).
3. Cost per metre of travel through a cell (dimensionless multiplier)::

       c(g) = 1 + k·g²                   for g <= g_steep
       c(g) = (1 + k·g²)·m_steep         for g >  g_steep
       c    = inf                        on nodata, and within one cell of nodata

4. Routes are found one after the other with :class:`skimage.graph.MCP_Geometric`
   (Dijkstra on the 8-connected grid, a move costs its length times the mean of the two
   cells' costs). Before each route, cells used by earlier routes have their cost
   multiplied by ``reuse_factor`` (< 1), so later routes join existing ones.
5. The union of all routes is turned into a graph of cells; it is cut into segments at
   junctions (cells where routes join, leave or cross, and endpoint cells), so segments
   that meet share the exact same vertex coordinates. Where two diagonal moves cross in
   an X without sharing a cell, a junction vertex is put at the crossing point.
6. Segments are simplified together (topology-preserving Douglas–Peucker, tolerance below
   one routing cell, so no simplified line can reach a nodata cell); their end vertices
   are kept exactly.

The grade is isotropic (steepest slope of the cell), so the penalty is conservative for a
road that would traverse a slope obliquely or with switchbacks. All coefficients are
invented tuning values chosen to give plausible demo networks, not values from a
published road-design standard.

References
----------
Dijkstra, E. W. (1959), "A note on two problems in connexion with graphs", Numerische
Mathematik 1, 269–271. scikit-image ``skimage.graph.MCP_Geometric`` documentation.
Douglas, D. H. and Peucker, T. K. (1973), Cartographica 10(2), 112–122.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import shapely
from affine import Affine
from scipy import ndimage
from scipy.sparse.csgraph import minimum_spanning_tree
from scipy.spatial.distance import cdist
from shapely.geometry import LineString, MultiLineString
from skimage.graph import MCP_Geometric

from pipeline.errors import AltigradeError

__all__ = [
    "TerrainRouteError",
    "TerrainCostModel",
    "RouteSegment",
    "RouteSummary",
    "RouteNetwork",
    "grade_from_elevation",
    "travel_cost_factor",
    "decimate_elevation",
    "default_route_pairs",
    "build_terrain_routes",
]


class TerrainRouteError(AltigradeError, ValueError):
    """The inputs to the terrain router cannot be used (bad shapes, transform, endpoints)."""


@dataclass(frozen=True)
class TerrainCostModel:
    """Coefficients of the slope-penalised travel cost.

    | field | symbol | units | default | source |
    |---|---|---|---|---|
    | ``grade_weight`` | k | – (per grade², grade as rise/run) | 150 | invented tuning value |
    | ``steep_grade`` | g_steep | – (rise/run) | 0.12 | invented; ~12 % is steep for a road |
    | ``steep_multiplier`` | m_steep | – | 25 | invented; makes steep cells "very costly" |
    | ``reuse_factor`` | r | – | 0.55 | invented; cost multiplier on already-used cells |

    With the defaults a cell at 5 % grade costs 1.38 × flat, 10 % costs 2.5 ×, and 13 %
    costs 88 ×.
    """

    grade_weight: float = 150.0
    steep_grade: float = 0.12
    steep_multiplier: float = 25.0
    reuse_factor: float = 0.55

    def __post_init__(self) -> None:
        if not (self.grade_weight >= 0 and math.isfinite(self.grade_weight)):
            raise TerrainRouteError(
                f"grade_weight must be finite and >= 0, got {self.grade_weight}"
            )
        if not self.steep_grade > 0:
            raise TerrainRouteError(f"steep_grade must be > 0, got {self.steep_grade}")
        if not self.steep_multiplier >= 1:
            raise TerrainRouteError(f"steep_multiplier must be >= 1, got {self.steep_multiplier}")
        if not 0 < self.reuse_factor <= 1:
            raise TerrainRouteError(f"reuse_factor must be in (0, 1], got {self.reuse_factor}")


@dataclass(frozen=True)
class RouteSegment:
    """One piece of the routed network, between two junctions or endpoints.

    Attributes
    ----------
    geometry : LineString
        Simplified line in the CRS of the input transform [m]. Its first and last vertices
        are exactly the coordinates of the junctions/endpoints it joins.
    route_ids : tuple of int
        Indices (into :attr:`RouteNetwork.routes`) of the routes that use this segment.
    start_endpoint, end_endpoint : int or None
        Index of the input endpoint at each end, or None at a plain junction.
    length_m : float
        Length of the simplified geometry [m].
    rise_m, fall_m : float
        Total climb and descent along the unsimplified path, in the geometry's direction,
        from the routing-grid elevation [m].
    max_grade_pct : float
        Steepest grade between consecutive routing cells along the path [%].
    connector : bool
        True for the short straight link from an endpoint's exact position to the centre
        of its routing cell (no terrain information; grades are 0).
    """

    geometry: LineString
    route_ids: tuple[int, ...]
    start_endpoint: int | None
    end_endpoint: int | None
    length_m: float
    rise_m: float
    fall_m: float
    max_grade_pct: float
    connector: bool = False


@dataclass(frozen=True)
class RouteSummary:
    """One requested connection.

    Attributes
    ----------
    pair : tuple of int
        Endpoint indices (from, to).
    reached : bool
        False when no passable path exists (separated by nodata).
    cost_m : float
        Accumulated cost in "flat-metre equivalents" (length × cost factor) [m]; inf when
        not reached. Includes the reuse discount in force when the route was built.
    path_length_m : float
        Length of the unsimplified cell path [m]; 0 when both ends fall in the same cell.
    snap_m : tuple of float
        Distance from each endpoint to the centre of the routing cell it was attached to [m].
    """

    pair: tuple[int, int]
    reached: bool
    cost_m: float
    path_length_m: float
    snap_m: tuple[float, float]


@dataclass(frozen=True)
class RouteNetwork:
    """Result of :func:`build_terrain_routes`.

    Attributes
    ----------
    segments : list of RouteSegment
        The noded, simplified network.
    routes : list of RouteSummary
        One per requested pair, in the order they were built.
    routing_transform : Affine
        Transform of the (possibly decimated) routing grid.
    routing_cell_m : tuple of float
        Cell size (x, y) of the routing grid [m].
    cell_paths : list of list of (row, col)
        Each route's unsimplified path as routing-grid cell indices (empty if not reached).
    """

    segments: list[RouteSegment]
    routes: list[RouteSummary]
    routing_transform: Affine
    routing_cell_m: tuple[float, float]
    cell_paths: list[list[tuple[int, int]]] = field(default_factory=list, repr=False)

    def records(self) -> list[dict]:
        """Segments as plain dicts (``geometry`` plus attributes), ready for a GeoDataFrame."""
        return [
            {
                "geometry": s.geometry,
                "route_ids": s.route_ids,
                "start_endpoint": s.start_endpoint,
                "end_endpoint": s.end_endpoint,
                "length_m": s.length_m,
                "rise_m": s.rise_m,
                "fall_m": s.fall_m,
                "max_grade_pct": s.max_grade_pct,
                "connector": s.connector,
            }
            for s in self.segments
        ]


def _check_transform(transform: Affine) -> tuple[float, float]:
    if not isinstance(transform, Affine):
        raise TerrainRouteError(
            f"transform must be an affine.Affine, got {type(transform).__name__}"
        )
    if transform.b != 0 or transform.d != 0:
        raise TerrainRouteError("transform must be north-up (no rotation or shear)")
    dx, dy = float(transform.a), float(-transform.e)
    if not (dx > 0 and dy > 0):
        raise TerrainRouteError(
            f"transform must have positive x cell size and negative y step, got a={dx}, e={-dy}"
        )
    return dx, dy


def grade_from_elevation(elevation: np.ndarray, cell_x_m: float, cell_y_m: float) -> np.ndarray:
    """Magnitude of the elevation gradient (steepest grade) of each cell.

    Parameters
    ----------
    elevation : ndarray, shape (rows, cols)
        Elevation [m]; NaN for nodata.
    cell_x_m, cell_y_m : float
        Cell size along x (columns) and y (rows) [m].

    Returns
    -------
    ndarray
        Grade as rise/run [–] (0.1 = 10 %). NaN on nodata cells and on cells whose central
        difference would use a nodata neighbour; one-sided differences on the grid edge.

    Notes
    -----
    ``g = sqrt((∂z/∂x)² + (∂z/∂y)²)`` with :func:`numpy.gradient` (second-order central
    differences inside, first-order at the edges). A grid with a single row or column uses
    only the other direction.

    References
    ----------
    from memory (standard finite-difference slope).
    """
    z = np.asarray(elevation, dtype=np.float64)
    if z.ndim != 2:
        raise TerrainRouteError(f"elevation must be 2-D, got shape {z.shape}")
    gy = np.gradient(z, cell_y_m, axis=0) if z.shape[0] > 1 else np.zeros_like(z)
    gx = np.gradient(z, cell_x_m, axis=1) if z.shape[1] > 1 else np.zeros_like(z)
    g = np.hypot(gx, gy)
    g[np.isnan(z)] = np.nan  # a central difference skips the cell itself
    return g


def travel_cost_factor(
    grade: np.ndarray | float, model: TerrainCostModel | None = None
) -> np.ndarray:
    """Cost of travel per metre relative to flat ground, from the grade.

    Parameters
    ----------
    grade : float or ndarray
        Grade as rise/run [–]; NaN marks an impassable cell.
    model : TerrainCostModel, optional
        Coefficients; defaults to ``TerrainCostModel()``.

    Returns
    -------
    ndarray
        Cost multiplier [–], >= 1; ``inf`` where ``grade`` is NaN.

    Notes
    -----
    ``c = 1 + k·g²``, multiplied by ``m_steep`` where ``g > g_steep`` (see
    :class:`TerrainCostModel` for the coefficients and their status).

    References
    ----------
    Invented penalty shape (quadratic in grade, as commonly used for least-cost road
    alignment; from memory).
    """
    m = model or TerrainCostModel()
    g = np.abs(np.asarray(grade, dtype=np.float64))
    c = 1.0 + m.grade_weight * g * g
    c = np.where(g > m.steep_grade, c * m.steep_multiplier, c)
    return np.where(np.isnan(g), np.inf, c)


def decimate_elevation(
    elevation: np.ndarray, transform: Affine, factor: int
) -> tuple[np.ndarray, Affine]:
    """Block-average an elevation grid by an integer factor.

    Parameters
    ----------
    elevation : ndarray, shape (rows, cols)
        Elevation [m], NaN for nodata.
    transform : Affine
        North-up transform of ``elevation`` [m].
    factor : int
        Block size in cells (>= 1).

    Returns
    -------
    (ndarray, Affine)
        Coarse elevation [m] (a block containing any NaN is NaN; the ragged last row/column
        of blocks average the cells they cover) and its transform.

    Notes
    -----
    Conservative for nodata: a coarse cell is passable only when all its fine cells are.
    """
    if factor < 1:
        raise TerrainRouteError(f"decimation factor must be >= 1, got {factor}")
    z = np.asarray(elevation, dtype=np.float64)
    if factor == 1:
        return z.copy(), transform
    rows, cols = z.shape
    nr, nc = -(-rows // factor), -(-cols // factor)
    pad = np.pad(z, ((0, nr * factor - rows), (0, nc * factor - cols)), constant_values=np.nan)
    blocks = pad.reshape(nr, factor, nc, factor)
    valid_pad = np.zeros(pad.shape, dtype=bool)
    valid_pad[:rows, :cols] = True
    inside = valid_pad.reshape(nr, factor, nc, factor)
    nodata = (np.isnan(blocks) & inside).any(axis=(1, 3))
    sums = np.where(inside, blocks, 0.0).sum(axis=(1, 3))
    counts = inside.sum(axis=(1, 3))
    coarse = sums / counts
    coarse[nodata] = np.nan
    return coarse, transform * Affine.scale(factor, factor)


def default_route_pairs(
    endpoints: Sequence[tuple[float, float]], *, k_nearest: int = 2
) -> list[tuple[int, int]]:
    """Pairs to connect when none are given: minimum spanning tree plus near neighbours.

    Parameters
    ----------
    endpoints : sequence of (x, y)
        Endpoint coordinates [m].
    k_nearest : int
        Each endpoint is also linked to its ``k_nearest`` nearest neighbours (the nearest
        one is always in the tree already, so ``k_nearest=2`` adds at most one extra link
        per endpoint).

    Returns
    -------
    list of (i, j)
        ``i < j``; tree edges first, by increasing straight-line length, then the extra
        links by increasing length. Endpoints at identical positions are linked once.

    Notes
    -----
    Euclidean minimum spanning tree over the complete graph
    (:func:`scipy.sparse.csgraph.minimum_spanning_tree`).
    """
    pts = np.asarray(endpoints, dtype=np.float64).reshape(-1, 2)
    n = len(pts)
    if n < 2:
        return []
    d = cdist(pts, pts)
    # csgraph treats 0 as "no edge": nudge coincident points to a tiny positive weight
    w = np.where(d > 0, d, 1e-9)
    np.fill_diagonal(w, 0.0)
    mst = minimum_spanning_tree(w).tocoo()
    tree = sorted(
        {(min(i, j), max(i, j)) for i, j in zip(mst.row, mst.col, strict=True)},
        key=lambda p: (d[p], p),
    )
    chosen = set(tree)
    extra: set[tuple[int, int]] = set()
    order = np.argsort(d, axis=1, kind="stable")
    for i in range(n):
        for j in order[i][order[i] != i][: max(k_nearest, 0)]:
            p = (min(i, int(j)), max(i, int(j)))
            if p not in chosen:
                extra.add(p)
    return tree + sorted(extra, key=lambda p: (d[p], p))


def _cell_of(transform: Affine, shape: tuple[int, int], x: float, y: float) -> tuple[int, int]:
    col_f, row_f = ~transform * (x, y)
    if not (math.isfinite(col_f) and math.isfinite(row_f)):
        raise TerrainRouteError(f"endpoint ({x}, {y}) is not a finite coordinate")
    r, c = int(math.floor(row_f)), int(math.floor(col_f))
    if not (0 <= r < shape[0] and 0 <= c < shape[1]):
        raise TerrainRouteError(f"endpoint ({x}, {y}) lies outside the elevation grid")
    return r, c


def _node_xy(transform: Affine, node: tuple[int, int]) -> tuple[float, float]:
    """Coordinates of a node given in doubled cell units (2·row, 2·col) [m]."""
    r2, c2 = node
    x, y = transform * (c2 / 2.0 + 0.5, r2 / 2.0 + 0.5)
    return float(x), float(y)


def _node_z(z: np.ndarray, node: tuple[int, int]) -> float:
    r2, c2 = node
    if r2 % 2 == 0 and c2 % 2 == 0:
        return float(z[r2 // 2, c2 // 2])
    r, c = r2 // 2, c2 // 2  # crossing point of the 2×2 block with top-left (r, c)
    return float(np.mean(z[r : r + 2, c : c + 2]))


def build_terrain_routes(
    elevation: np.ndarray,
    transform: Affine,
    endpoints: Sequence[tuple[float, float]],
    pairs: Sequence[tuple[int, int]] | None = None,
    *,
    model: TerrainCostModel | None = None,
    max_grid_cells: int | None = 640,
    simplify_tolerance_m: float | None = None,
    nodata_buffer_cells: int = 1,
) -> RouteNetwork:
    """Route least-cost, slope-penalised paths between endpoints and node them into a network.

    Parameters
    ----------
    elevation : ndarray, shape (rows, cols)
        Elevation [m], float; NaN for nodata (water, voids) — impassable.
    transform : affine.Affine
        North-up transform of ``elevation``, metric CRS [m].
    endpoints : sequence of (x, y)
        Endpoint coordinates in the same CRS [m]. An endpoint on an impassable cell is
        attached to the nearest passable cell (see ``RouteSummary.snap_m``).
    pairs : sequence of (i, j), optional
        Which endpoints to connect, in build order (earlier routes are the ones later
        routes merge onto, so put the most important first). Default:
        :func:`default_route_pairs`.
    model : TerrainCostModel, optional
        Cost coefficients.
    max_grid_cells : int or None
        Grids with more cells than this along either side are block-averaged by the
        smallest integer factor that brings both sides within it. None: never decimate.
    simplify_tolerance_m : float, optional
        Douglas–Peucker tolerance [m]; default half the routing cell size. Capped below the
        routing cell size times ``nodata_buffer_cells`` so lines cannot enter nodata.
    nodata_buffer_cells : int
        Routing cells within this many cells (8-neighbourhood) of nodata are impassable.

    Returns
    -------
    RouteNetwork
        Noded, simplified segments with attributes, and one summary per pair.

    Raises
    ------
    TerrainRouteError
        Non-2-D elevation, rotated transform, an endpoint outside the grid, a pair index
        out of range, or no passable cell at all.

    Notes
    -----
    See the module docstring for the cost equation and the merging and noding rules. Cost
    of a move between neighbouring cells a, b (MCP_Geometric): ``ℓ_ab·(c_a + c_b)/2`` with
    ``ℓ_ab`` the centre-to-centre distance [m].

    References
    ----------
    scikit-image ``skimage.graph.MCP_Geometric``; Dijkstra (1959).
    """
    model = model or TerrainCostModel()
    z_full = np.asarray(elevation, dtype=np.float64)
    if z_full.ndim != 2 or min(z_full.shape) < 1:
        raise TerrainRouteError(
            f"elevation must be a non-empty 2-D array, got shape {z_full.shape}"
        )
    _check_transform(transform)
    pts = [(float(x), float(y)) for x, y in endpoints]
    if pairs is None:
        pairs = default_route_pairs(pts)
    pairs = [(int(i), int(j)) for i, j in pairs]
    for i, j in pairs:
        if not (0 <= i < len(pts) and 0 <= j < len(pts)):
            raise TerrainRouteError(f"pair ({i}, {j}) refers to an endpoint that does not exist")

    factor = 1
    if max_grid_cells is not None and max(z_full.shape) > max_grid_cells:
        factor = int(math.ceil(max(z_full.shape) / max_grid_cells))
    z, tr = decimate_elevation(z_full, transform, factor)
    dx, dy = _check_transform(tr)
    shape = z.shape

    grade = grade_from_elevation(z, dx, dy)
    blocked = np.isnan(grade)
    if nodata_buffer_cells > 0 and np.isnan(z).any():
        blocked |= ndimage.binary_dilation(
            np.isnan(z), structure=np.ones((3, 3), bool), iterations=nodata_buffer_cells
        )
    if blocked.all():
        raise TerrainRouteError("no passable cell in the elevation grid")
    base_cost = travel_cost_factor(np.where(blocked, np.nan, grade), model)

    # attach endpoints to cells (nearest passable cell if theirs is blocked)
    _, (near_r, near_c) = ndimage.distance_transform_edt(blocked, return_indices=True)
    cells: list[tuple[int, int]] = []
    snaps: list[float] = []
    for x, y in pts:
        r, c = _cell_of(tr, shape, x, y)
        r, c = int(near_r[r, c]), int(near_c[r, c])
        cells.append((r, c))
        cx, cy = _node_xy(tr, (2 * r, 2 * c))
        snaps.append(math.hypot(x - cx, y - cy))

    used = np.zeros(shape, dtype=bool)
    summaries: list[RouteSummary] = []
    paths: list[list[tuple[int, int]]] = []
    for i, j in pairs:
        s, t = cells[i], cells[j]
        if s == t:
            summaries.append(RouteSummary((i, j), True, 0.0, 0.0, (snaps[i], snaps[j])))
            paths.append([s])
            continue
        cost = np.where(used, base_cost * model.reuse_factor, base_cost)
        mcp = MCP_Geometric(cost, sampling=(dy, dx), fully_connected=True)
        cum, _ = mcp.find_costs([s], [t])
        total = float(cum[t])
        if not math.isfinite(total):
            summaries.append(RouteSummary((i, j), False, math.inf, 0.0, (snaps[i], snaps[j])))
            paths.append([])
            continue
        path = [(int(a), int(b)) for a, b in mcp.traceback(t)]
        arr = np.asarray(path)
        used[arr[:, 0], arr[:, 1]] = True
        steps = np.diff(arr, axis=0) * (dy, dx)
        plen = float(np.hypot(steps[:, 0], steps[:, 1]).sum())
        summaries.append(RouteSummary((i, j), True, total, plen, (snaps[i], snaps[j])))
        paths.append(path)

    segments = _node_network(paths, cells, pts, summaries, z, tr)
    tol = 0.5 * min(dx, dy) if simplify_tolerance_m is None else float(simplify_tolerance_m)
    if nodata_buffer_cells > 0:
        tol = min(tol, 0.95 * min(dx, dy) * nodata_buffer_cells)
    segments = _simplify(segments, tol)
    return RouteNetwork(segments, summaries, tr, (dx, dy), paths)


def _node_network(
    paths: list[list[tuple[int, int]]],
    cells: list[tuple[int, int]],
    pts: list[tuple[float, float]],
    summaries: list[RouteSummary],
    z: np.ndarray,
    tr: Affine,
) -> list[RouteSegment]:
    """Cut the union of cell paths into segments between junctions (unsimplified)."""
    Node = tuple[int, int]
    edges: dict[frozenset, set[int]] = {}
    for rid, path in enumerate(paths):
        for (r0, c0), (r1, c1) in zip(path[:-1], path[1:], strict=True):
            e = frozenset(((2 * r0, 2 * c0), (2 * r1, 2 * c1)))
            edges.setdefault(e, set()).add(rid)

    # X crossings of two diagonal moves that share no cell: insert the crossing point
    diag = [e for e in edges if _is_diagonal(e)]
    for e in diag:
        if e not in edges:
            continue
        (a, b) = sorted(e)
        (r0, c0), (r1, c1) = a, b  # a has the smaller row (sorted on (row, col))
        other = frozenset(((r0, c1), (r1, c0)))
        if other in edges:
            mid = ((r0 + r1) // 2, (c0 + c1) // 2)
            for ee in (e, other):
                rids = edges.pop(ee)
                for end in ee:
                    edges.setdefault(frozenset((end, mid)), set()).update(rids)

    adj: dict[Node, list[Node]] = {}
    for e in edges:
        a, b = tuple(e)
        adj.setdefault(a, []).append(b)
        adj.setdefault(b, []).append(a)
    for nbrs in adj.values():
        nbrs.sort()

    endpoint_at: dict[Node, int] = {}
    for k, (r, c) in enumerate(cells):
        endpoint_at.setdefault((2 * r, 2 * c), k)
    terminals = {
        (2 * r, 2 * c)
        for k, (r, c) in enumerate(cells)
        if any(k in s.pair and s.reached for s in summaries)
    }

    def is_junction(n: Node) -> bool:
        nb = adj[n]
        if n in terminals or len(nb) != 2:
            return True
        return edges[frozenset((n, nb[0]))] != edges[frozenset((n, nb[1]))]

    seen: set[frozenset] = set()
    chains: list[list[Node]] = []

    def walk(start: Node, nxt: Node) -> list[Node]:
        chain = [start, nxt]
        seen.add(frozenset((start, nxt)))
        prev, cur = start, nxt
        while not is_junction(cur):
            a, b = adj[cur]
            step = b if a == prev else a
            e = frozenset((cur, step))
            if e in seen:
                break
            seen.add(e)
            chain.append(step)
            prev, cur = cur, step
        return chain

    for n in sorted(adj):
        if is_junction(n):
            for m in adj[n]:
                if frozenset((n, m)) not in seen:
                    chains.append(walk(n, m))
    for n in sorted(adj):  # pure cycles (no junction on them)
        for m in adj[n]:
            if frozenset((n, m)) not in seen:
                chains.append(walk(n, m))

    segments: list[RouteSegment] = []
    for ch in chains:
        rids = tuple(sorted(edges[frozenset((ch[0], ch[1]))]))
        xy = [_node_xy(tr, n) for n in ch]
        zz = np.array([_node_z(z, n) for n in ch])
        d = np.hypot(*np.diff(np.asarray(xy), axis=0).T)
        dz = np.diff(zz)
        segments.append(
            RouteSegment(
                geometry=LineString(xy),
                route_ids=rids,
                start_endpoint=endpoint_at.get(ch[0]) if ch[0] in terminals else None,
                end_endpoint=endpoint_at.get(ch[-1]) if ch[-1] in terminals else None,
                length_m=float(d.sum()),
                rise_m=float(dz[dz > 0].sum()),
                fall_m=float(-dz[dz < 0].sum()),
                max_grade_pct=float(100.0 * np.max(np.abs(dz) / d)) if len(d) else 0.0,
            )
        )

    # connectors from each endpoint's exact position to its cell centre
    for k, (r, c) in enumerate(cells):
        node = (2 * r, 2 * c)
        if node not in terminals:
            continue
        cxy = _node_xy(tr, node)
        if math.hypot(pts[k][0] - cxy[0], pts[k][1] - cxy[1]) <= 0.0:
            continue
        rids = tuple(i for i, s in enumerate(summaries) if s.reached and k in s.pair)
        ln = LineString([pts[k], cxy])
        segments.append(RouteSegment(ln, rids, k, None, float(ln.length), 0.0, 0.0, 0.0, True))
    return segments


def _is_diagonal(e: frozenset) -> bool:
    (r0, c0), (r1, c1) = tuple(e)
    return r0 != r1 and c0 != c1


def _simplify(segments: list[RouteSegment], tol: float) -> list[RouteSegment]:
    """Simplify all non-connector segments together, keeping their end vertices."""
    if tol <= 0:
        return segments
    idx = [k for k, s in enumerate(segments) if not s.connector and len(s.geometry.coords) > 2]
    if not idx:
        return segments
    lines = []
    for k in idx:
        g = segments[k].geometry
        coords = list(g.coords)
        # a closed chain could collapse; simplify its two halves separately
        if coords[0] == coords[-1]:
            h = len(coords) // 2
            lines.append(LineString(coords[: h + 1]))
            lines.append(LineString(coords[h:]))
        else:
            lines.append(g)
    simp = shapely.simplify(MultiLineString(lines), tol, preserve_topology=True)
    parts = list(simp.geoms) if hasattr(simp, "geoms") else [simp]
    if len(parts) != len(lines):  # fall back to line-by-line simplification
        parts = [shapely.simplify(g, tol, preserve_topology=True) for g in lines]
    out = list(segments)
    p = 0
    for k in idx:
        coords = list(segments[k].geometry.coords)
        if coords[0] == coords[-1]:
            geom = LineString(list(parts[p].coords) + list(parts[p + 1].coords)[1:])
            p += 2
        else:
            geom = parts[p]
            p += 1
        s = segments[k]
        out[k] = RouteSegment(
            geom,
            s.route_ids,
            s.start_endpoint,
            s.end_endpoint,
            float(geom.length),
            s.rise_m,
            s.fall_m,
            s.max_grade_pct,
            s.connector,
        )
    return out
