"""Tests for pipeline.terrain_routes (least-cost routes over a slope-penalised cost grid).

Outside references used here:
* scipy.sparse.csgraph.dijkstra on an 8-connected grid graph built in this file from the same
  cost grid (edge weight = centre distance × mean of the two cells' costs) — an independent
  shortest-path implementation to check skimage's MCP_Geometric result and path.
* networkx.minimum_spanning_tree for the default pair selection.
* Analytic gradients of planes (exact for central differences).
"""

from __future__ import annotations

import itertools
import math

import networkx as nx
import numpy as np
import pytest
import shapely
from affine import Affine
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import dijkstra

from pipeline.errors import AltigradeError
from pipeline.terrain_routes import (
    TerrainCostModel,
    TerrainRouteError,
    build_terrain_routes,
    decimate_elevation,
    default_route_pairs,
    grade_from_elevation,
    travel_cost_factor,
)

CELL = 100.0
X0, Y0 = 500_000.0, 4_000_000.0


def _tr(cell: float = CELL) -> Affine:
    return Affine(cell, 0.0, X0, 0.0, -cell, Y0)


def _xy(row: float, col: float, cell: float = CELL) -> tuple[float, float]:
    """Centre of cell (row, col) [m]."""
    return X0 + (col + 0.5) * cell, Y0 - (row + 0.5) * cell


def _rc(x: float, y: float, cell: float = CELL) -> tuple[float, float]:
    return (Y0 - y) / cell - 0.5, (x - X0) / cell - 0.5


def _ridge_with_gap(n: int = 41, gap_row: int = 30) -> np.ndarray:
    """A N–S ridge (600 m high, along column n//2) with one low gap centred on gap_row."""
    r, c = np.mgrid[0:n, 0:n].astype(float)
    height = 600.0 * (1.0 - 0.92 * np.exp(-(((r - gap_row) / 3.0) ** 2)))
    return 1000.0 + height * np.exp(-(((c - n // 2) / 4.0) ** 2))


def _grid_graph_dijkstra(cost: np.ndarray, cell: float, src: tuple[int, int]):
    """Independent reference: 8-connected grid graph, weight = ℓ·(c_a + c_b)/2, via csgraph."""
    rows, cols = cost.shape
    idx = np.arange(rows * cols).reshape(rows, cols)
    a_list, b_list, w_list = [], [], []
    for dr, dc in [(0, 1), (1, 0), (1, 1), (1, -1)]:
        r0 = slice(0, rows - dr)
        c0 = slice(max(0, -dc), cols - max(0, dc))
        r1 = slice(dr, rows)
        c1 = slice(max(0, dc), cols + min(0, dc))
        ca, cb = cost[r0, c0], cost[r1, c1]
        w = math.hypot(dr, dc) * cell * (ca + cb) / 2.0
        ok = np.isfinite(w)
        a_list.append(idx[r0, c0][ok])
        b_list.append(idx[r1, c1][ok])
        w_list.append(w[ok])
    a = np.concatenate(a_list)
    b = np.concatenate(b_list)
    w = np.concatenate(w_list)
    g = coo_matrix((w, (a, b)), shape=(rows * cols, rows * cols)).tocsr()
    dist, pred = dijkstra(g, directed=False, indices=idx[src], return_predecessors=True)
    return dist.reshape(rows, cols), pred, idx


def _assert_noded(lines: list) -> None:
    """Lines may meet only at shared end vertices (what the road-graph builder snaps)."""
    for a, b in itertools.combinations(lines, 2):
        inter = a.intersection(b)
        if inter.is_empty:
            continue
        ends = {a.coords[0], a.coords[-1]} & {b.coords[0], b.coords[-1]}
        assert inter.geom_type in ("Point", "MultiPoint"), inter.wkt
        for p in shapely.get_coordinates(inter):
            assert tuple(p) in ends, f"lines cross at {tuple(p)} without a shared vertex"


# ----------------------------------------------------------------------------- grade and cost
def test_grade_of_plane_is_exact():
    # analytic: z = 0.03 x + 0.04 y has grade sqrt(0.03² + 0.04²) = 0.05 everywhere
    r, c = np.mgrid[0:7, 0:9].astype(float)
    z = 0.03 * c * 30.0 - 0.04 * r * 20.0
    g = grade_from_elevation(z, 30.0, 20.0)
    np.testing.assert_allclose(g, 0.05, rtol=1e-12)


def test_grade_nan_propagates_to_neighbours():
    z = np.zeros((5, 5))
    z[2, 2] = np.nan
    g = grade_from_elevation(z, 10.0, 10.0)
    assert np.isnan(g[2, 2]) and np.isnan(g[1, 2]) and np.isnan(g[2, 3])
    assert g[0, 0] == 0.0


@pytest.mark.parametrize(
    ("grade", "expected"),
    [
        # hand calculation of the documented equation with the default coefficients
        (0.0, 1.0),
        (0.05, 1.0 + 150.0 * 0.05**2),  # 1.375
        (-0.10, 1.0 + 150.0 * 0.10**2),  # downhill costs the same as uphill
        (0.13, (1.0 + 150.0 * 0.13**2) * 25.0),  # above the 12 % cap
        (np.nan, np.inf),  # impassable
    ],
)
def test_travel_cost_factor_values(grade, expected):
    assert float(travel_cost_factor(grade)) == pytest.approx(expected, rel=1e-12)


def test_travel_cost_factor_is_monotonic_and_jumps_at_cap():
    g = np.linspace(0, 0.3, 301)
    c = travel_cost_factor(g)
    assert np.all(np.diff(c) >= 0)
    m = TerrainCostModel()
    below = float(travel_cost_factor(m.steep_grade))
    above = float(travel_cost_factor(m.steep_grade + 1e-6))
    assert above > 10 * below


@pytest.mark.parametrize(
    "kwargs",
    [
        {"reuse_factor": 0.0},
        {"steep_multiplier": 0.5},
        {"grade_weight": -1.0},
        {"steep_grade": 0.0},
    ],
)
def test_cost_model_rejects_bad_coefficients(kwargs):
    with pytest.raises(TerrainRouteError):
        TerrainCostModel(**kwargs)


# ----------------------------------------------------------------------------- decimation
def test_decimate_block_mean_and_nodata():
    z = np.arange(25, dtype=float).reshape(5, 5)
    z[0, 0] = np.nan
    coarse, tr = decimate_elevation(z, _tr(), 2)
    assert coarse.shape == (3, 3)
    assert np.isnan(coarse[0, 0])  # any nodata in the block → nodata
    assert coarse[0, 1] == pytest.approx(np.mean([2, 3, 7, 8]))
    assert coarse[2, 2] == pytest.approx(24.0)  # ragged corner block: its single cell
    assert coarse[1, 2] == pytest.approx(np.mean([14, 19]))
    assert tr.a == 2 * CELL and tr.e == -2 * CELL and (tr.c, tr.f) == (X0, Y0)


# ----------------------------------------------------------------------------- routing
def test_route_through_single_gap_matches_csgraph_reference():
    z = _ridge_with_gap()
    src, dst = (10, 5), (10, 35)
    net = build_terrain_routes(z, _tr(), [_xy(*src), _xy(*dst)], [(0, 1)], max_grid_cells=None)
    (route,) = net.routes
    assert route.reached

    # independent reference on the same cost grid (cost from the public functions)
    cost = travel_cost_factor(grade_from_elevation(z, CELL, CELL))
    dist, pred, idx = _grid_graph_dijkstra(cost, CELL, src)
    assert route.cost_m == pytest.approx(dist[dst], rel=1e-9)

    # both paths cross the ridge crest (column 20) inside the gap (rows 30 ± 4)
    path = np.asarray(net.cell_paths[0])
    crest_rows = path[path[:, 1] == 20, 0]
    assert len(crest_rows) and np.all(np.abs(crest_rows - 30) <= 4)
    ref_rows = []
    k = idx[dst]
    while k >= 0:
        r, c = divmod(int(k), z.shape[1])
        if c == 20:
            ref_rows.append(r)
        k = pred[k]
    assert ref_rows and all(abs(r - 30) <= 4 for r in ref_rows)

    # the straight line over the crest would be far costlier
    straight = cost[10, 5:36]
    assert route.cost_m < CELL * float(np.sum((straight[:-1] + straight[1:]) / 2))


def test_route_geometry_valid_simplified_and_in_crs():
    z = _ridge_with_gap()
    pts = [_xy(10, 5), _xy(10, 35)]
    net = build_terrain_routes(z, _tr(), pts, [(0, 1)], max_grid_cells=None)
    lines = [s.geometry for s in net.segments]
    assert lines and all(g.geom_type == "LineString" and g.is_valid and g.length > 0 for g in lines)
    n_vertices = sum(len(g.coords) for g in lines)
    assert n_vertices < len(net.cell_paths[0])  # simplified
    minx, miny, maxx, maxy = shapely.total_bounds(lines)
    assert X0 <= minx and maxx <= X0 + 41 * CELL and Y0 - 41 * CELL <= miny and maxy <= Y0
    # the network joins the two exact endpoints
    coords = {c for g in lines for c in (g.coords[0], g.coords[-1])}
    assert set(pts) <= coords
    # the simplified line stays within the tolerance of the cell path
    cell_line = shapely.LineString([_xy(r, c) for r, c in net.cell_paths[0]])
    merged = shapely.line_merge(shapely.union_all(lines))
    assert merged.hausdorff_distance(cell_line) <= 0.5 * CELL + 1e-6


def test_routes_avoid_nodata():
    z = np.full((40, 40), 800.0)
    z[0:34, 19:21] = np.nan  # a wall of nodata with a way round at the bottom
    net = build_terrain_routes(z, _tr(), [_xy(5, 5), _xy(5, 34)], [(0, 1)], max_grid_cells=None)
    assert net.routes[0].reached
    r, c = np.nonzero(np.isnan(z))
    holes = shapely.union_all(
        [
            shapely.box(X0 + cc * CELL, Y0 - (rr + 1) * CELL, X0 + (cc + 1) * CELL, Y0 - rr * CELL)
            for rr, cc in zip(r, c, strict=True)
        ]
    )
    for s in net.segments:
        assert not s.geometry.intersects(holes)
        assert s.geometry.distance(holes) >= 0.5 * CELL - 1e-6
    rows = [_rc(*p)[0] for s in net.segments for p in s.geometry.coords]
    assert max(rows) >= 34  # it went round the end of the wall


def test_unreachable_pair_is_reported_not_drawn():
    z = np.full((20, 20), 500.0)
    z[:, 10] = np.nan  # complete wall
    net = build_terrain_routes(
        z, _tr(), [_xy(5, 2), _xy(5, 17), _xy(15, 3)], [(0, 1), (0, 2)], max_grid_cells=None
    )
    assert not net.routes[0].reached and math.isinf(net.routes[0].cost_m)
    assert net.routes[1].reached
    assert all(0 not in s.route_ids for s in net.segments)


def test_endpoint_on_nodata_snaps_to_passable_cell():
    z = np.full((20, 20), 500.0)
    z[8:12, 8:12] = np.nan
    net = build_terrain_routes(z, _tr(), [_xy(10, 10), _xy(10, 18)], [(0, 1)], max_grid_cells=None)
    assert net.routes[0].reached
    assert net.routes[0].snap_m[0] > 2 * CELL  # moved out of the hole and its 1-cell buffer


def test_merged_routes_share_exact_junction_vertex():
    z = np.full((60, 60), 300.0)
    a, b, c = _xy(20, 5), _xy(40, 5), _xy(30, 55)
    net = build_terrain_routes(z, _tr(), [a, b, c], [(0, 2), (1, 2)], max_grid_cells=None)
    lines = [s.geometry for s in net.segments]
    _assert_noded(lines)
    ends = [p for g in lines for p in (g.coords[0], g.coords[-1])]
    degree = {p: ends.count(p) for p in set(ends)}
    junctions = [p for p, k in degree.items() if k == 3]
    assert len(junctions) == 1
    # the trunk from the junction to C carries both routes
    trunk = [s for s in net.segments if set(s.route_ids) == {0, 1}]
    assert len(trunk) == 1
    assert set(trunk[0].geometry.coords[:: len(trunk[0].geometry.coords) - 1]) == {junctions[0], c}
    # merging is what the reuse discount buys: less road than two independent routes
    free = build_terrain_routes(
        z,
        _tr(),
        [a, b, c],
        [(0, 2), (1, 2)],
        max_grid_cells=None,
        model=TerrainCostModel(reuse_factor=1.0),
    )
    assert sum(g.length for g in lines) < 0.9 * sum(s.geometry.length for s in free.segments)


def test_diagonal_x_crossing_gets_a_junction_vertex():
    z = np.full((10, 10), 100.0)
    pts = [_xy(0, 0), _xy(9, 9), _xy(0, 9), _xy(9, 0)]
    net = build_terrain_routes(
        z,
        _tr(),
        pts,
        [(0, 1), (2, 3)],
        max_grid_cells=None,
        model=TerrainCostModel(reuse_factor=1.0),
    )
    lines = [s.geometry for s in net.segments]
    _assert_noded(lines)
    centre = (X0 + 5 * CELL, Y0 - 5 * CELL)  # the corner shared by cells (4,4),(4,5),(5,4),(5,5)
    ends = [p for g in lines for p in (g.coords[0], g.coords[-1])]
    assert ends.count(centre) == 4


def test_network_of_many_endpoints_is_noded_and_connected():
    rng = np.random.default_rng(7)
    r, c = np.mgrid[0:80, 0:80].astype(float)
    z = 1000 + 300 * np.sin(r / 9.0) * np.cos(c / 11.0) + rng.normal(0, 5, r.shape)
    pts = [_xy(*rng.uniform(3, 77, 2)) for _ in range(9)]
    net = build_terrain_routes(z, _tr(), pts, max_grid_cells=None)
    assert all(s.reached for s in net.routes)
    lines = [s.geometry for s in net.segments]
    assert all(g.is_valid and g.is_simple for g in lines)
    _assert_noded(lines)
    g = nx.Graph()
    for ln in lines:
        g.add_edge(ln.coords[0], ln.coords[-1])
    assert nx.is_connected(g)
    assert set(pts) <= set(g.nodes)


def test_decimated_routing_grid():
    z = _ridge_with_gap(n=121, gap_row=90)
    net = build_terrain_routes(z, _tr(), [_xy(30, 15), _xy(30, 105)], [(0, 1)], max_grid_cells=50)
    assert net.routing_cell_m == (3 * CELL, 3 * CELL)
    assert net.routes[0].reached
    # the coarse route still goes through the gap (crest column 60 → coarse column 20)
    path = np.asarray(net.cell_paths[0])
    assert np.all(np.abs(path[path[:, 1] == 20, 0] * 3 + 1 - 90) <= 12)


def test_same_inputs_same_network():
    z = _ridge_with_gap()
    pts = [_xy(10, 5), _xy(10, 35), _xy(35, 5)]
    a = build_terrain_routes(z, _tr(), pts, max_grid_cells=None)
    b = build_terrain_routes(z, _tr(), pts, max_grid_cells=None)
    assert [s.geometry.wkb for s in a.segments] == [s.geometry.wkb for s in b.segments]


# ----------------------------------------------------------------------------- pairs
def test_default_pairs_contain_a_minimum_spanning_tree():
    rng = np.random.default_rng(3)
    pts = [tuple(p) for p in rng.uniform(0, 10_000, (12, 2))]
    pairs = default_route_pairs(pts, k_nearest=2)
    d = lambda i, j: math.dist(pts[i], pts[j])  # noqa: E731
    tree = pairs[:11]
    # reference: networkx minimum spanning tree weight on the complete graph
    kg = nx.complete_graph(len(pts))
    for i, j in kg.edges:
        kg[i][j]["weight"] = d(i, j)
    ref = nx.minimum_spanning_tree(kg)
    assert sum(d(i, j) for i, j in tree) == pytest.approx(ref.size(weight="weight"), rel=1e-12)
    g = nx.Graph(tree)
    assert nx.is_tree(g) and g.number_of_nodes() == 12
    # every endpoint is linked to its second-nearest neighbour as well
    for i in range(12):
        order = sorted((j for j in range(12) if j != i), key=lambda j: d(i, j))
        assert (min(i, order[1]), max(i, order[1])) in pairs
    assert len(set(pairs)) == len(pairs) and all(i < j for i, j in pairs)


def test_default_pairs_edge_cases():
    assert default_route_pairs([]) == []
    assert default_route_pairs([(0.0, 0.0)]) == []
    assert default_route_pairs([(0.0, 0.0), (0.0, 0.0)]) == [(0, 1)]


# ----------------------------------------------------------------------------- errors
def test_errors_are_altigrade_errors():
    z = np.zeros((10, 10))
    with pytest.raises(TerrainRouteError) as exc:
        build_terrain_routes(z, _tr(), [_xy(1, 1), (X0 - 500.0, Y0)], [(0, 1)])
    assert isinstance(exc.value, AltigradeError) and isinstance(exc.value, ValueError)
    with pytest.raises(TerrainRouteError):
        build_terrain_routes(z, Affine(CELL, 0.5, X0, 0.0, -CELL, Y0), [_xy(1, 1)], [])
    with pytest.raises(TerrainRouteError):
        build_terrain_routes(z, _tr(), [_xy(1, 1)], [(0, 3)])
    with pytest.raises(TerrainRouteError):
        build_terrain_routes(np.zeros(5), _tr(), [], [])
    with pytest.raises(TerrainRouteError):
        build_terrain_routes(np.full((4, 4), np.nan), _tr(), [], [])
