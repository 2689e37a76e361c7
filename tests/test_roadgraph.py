"""Road graph building, edge profiles and snapping (pipeline.roadgraph).

Outside references: networkx shortest paths, GEOS noding (shapely.unary_union) as an
independent noder, pyproj's geodesic lengths, analytic profiles of planar DEMs.
"""

from __future__ import annotations

import geopandas as gpd
import networkx as nx
import numpy as np
import pytest
import rasterio
import shapely
from pyproj import CRS, Geod
from rasterio.transform import from_origin
from scipy.sparse.csgraph import dijkstra
from scipy.spatial import cKDTree
from shapely.geometry import LineString, MultiLineString

from pipeline import roadgraph as rg

UTM = "EPSG:32608"  # demo-region CRS (SCHEMA.md)
X0, Y0 = 300_000.0, 4_500_000.0  # demo-region upper-left corner (SCHEMA.md)


def _gdf(geoms, crs=UTM, **cols):
    return gpd.GeoDataFrame(cols, geometry=list(geoms), crs=crs)


def _dem(tmp_path, z, cell_m, *, name="dem.tif", nodata=-9999.0, crs=UTM, x0=X0, y0=Y0):
    """Write a small tiled GeoTIFF (explicit CRS, transform, nodata) and return its path."""
    path = tmp_path / name
    z = np.asarray(z, dtype="float32")
    with rasterio.open(
        path,
        "w",
        driver="GTiff",
        width=z.shape[1],
        height=z.shape[0],
        count=1,
        dtype="float32",
        crs=crs,
        transform=from_origin(x0, y0, cell_m, cell_m),
        nodata=nodata,
        tiled=True,
        blockxsize=16,
        blockysize=16,
    ) as ds:
        ds.write(z, 1)
    return path


# ----------------------------------------------------------------------------------------------
# Noding
# ----------------------------------------------------------------------------------------------


def test_two_crossing_lines_become_four_edges_with_a_shared_node():
    g = rg.build_road_graph(
        _gdf([LineString([(0, 0), (100, 0)]), LineString([(50, -50), (50, 50)])])
    )
    assert g.n_edges == 4
    assert g.n_nodes == 5
    degree = np.bincount(np.r_[g.u, g.v], minlength=g.n_nodes)
    centre = int(np.argmax(degree))
    assert degree[centre] == 4
    np.testing.assert_allclose(g.node_xy[centre], [50.0, 0.0], atol=1e-9)
    assert g.stats["intersections_noded"] == 1
    assert g.stats["components"] == 1


@pytest.mark.parametrize(
    ("column", "value"), [("bridge", True), ("is_bridge", "yes"), ("BRIDGE", 1)]
)
def test_crossing_a_bridge_is_not_noded(column, value):
    g = rg.build_road_graph(
        _gdf(
            [LineString([(0, 0), (100, 0)]), LineString([(50, -50), (50, 50)])],
            **{column: [False, value]},
        )
    )
    assert g.n_edges == 2
    assert g.n_nodes == 4
    assert g.stats["bridge_crossings_skipped"] == 1
    assert g.stats["components"] == 2
    assert bool(g.attributes["bridge"].sum() == 1)


def test_bridge_shares_a_mid_span_vertex_without_connecting_but_its_ends_connect():
    road = LineString([(0, 0), (50, 0), (100, 0)])
    bridge = LineString([(50, -50), (50, 0), (50, 50)])  # shares (50, 0) mid-span
    ramp = LineString([(50, 50), (80, 80)])  # joins the bridge's end
    g = rg.build_road_graph(_gdf([road, bridge, ramp], bridge=[False, True, False]))
    # road cut at its shared vertex only if another non-bridge line shares it: it does not.
    assert g.n_edges == 3
    assert g.stats["components"] == 2


def test_crossing_in_the_middle_of_segments_and_t_junction_undershoot():
    lines = [
        LineString([(0, 0), (100, 0)]),
        LineString([(50, 0.4), (50, 50)]),  # ends 0.4 m short of the first line
        LineString([(10, -30), (40, 30)]),  # crosses the first line mid-segment
    ]
    g = rg.build_road_graph(_gdf(lines), snap_tolerance_m=1.0)
    assert g.stats["endpoint_snaps"] == 1
    degree = np.bincount(np.r_[g.u, g.v], minlength=g.n_nodes)
    assert sorted(degree[degree > 1].tolist()) == [3, 4]
    # without snapping the undershoot stays a gap
    g0 = rg.build_road_graph(_gdf(lines), snap_tolerance_m=0.0)
    assert g0.stats["components"] == 2


def test_snapping_tolerance_merges_close_ends_only():
    lines = [LineString([(0, 0), (100, 0)]), LineString([(100.6, 0.0), (200, 0)])]
    joined = rg.build_road_graph(_gdf(lines), snap_tolerance_m=1.0)
    apart = rg.build_road_graph(_gdf(lines), snap_tolerance_m=0.5)
    assert joined.stats["components"] == 1 and joined.stats["snapped_vertex_merges"] == 1
    assert apart.stats["components"] == 2 and apart.stats["snapped_vertex_merges"] == 0


def test_exact_duplicates_and_zero_length_pieces_are_dropped():
    a = LineString([(0, 0), (50, 10), (100, 0)])
    lines = [a, shapely.reverse(a), LineString([(5, 5), (5, 5)]), LineString([(7, 7), (7.2, 7)])]
    g = rg.build_road_graph(_gdf(lines), snap_tolerance_m=1.0)
    assert g.n_edges == 1
    assert g.stats["duplicates_dropped"] == 1
    assert g.stats["zero_length_dropped"] == 2


def test_multilinestring_parts_and_components():
    mls = MultiLineString([[(0, 0), (10, 0)], [(100, 0), (110, 0), (120, 0)]])
    g = rg.build_road_graph(_gdf([mls, LineString([(120, 0), (130, 5)])]))
    assert g.stats["line_parts"] == 3
    assert g.n_edges == 3
    assert g.stats["components"] == 2
    assert g.stats["largest_component_nodes"] == 3


@pytest.mark.parametrize(
    ("column", "value", "forward_only"),
    [
        ("oneway", True, True),
        ("one_way", "yes", True),
        ("oneway", -1, False),
        ("oneway", "no", None),
    ],
)
def test_oneway_variants(column, value, forward_only):
    g = rg.build_road_graph(_gdf([LineString([(0, 0), (100, 0)])], **{column: [value]}))
    a = g.adjacency.toarray()
    start = int(np.argmin(g.node_xy[:, 0]))  # the digitised start (0, 0)
    end = 1 - start
    if forward_only is None:
        assert a[start, end] > 0 and a[end, start] > 0
    elif forward_only:
        assert a[start, end] > 0 and a[end, start] == 0
    else:
        assert a[start, end] == 0 and a[end, start] > 0


def test_attribute_variants_are_parsed():
    g = rg.build_road_graph(
        _gdf([LineString([(0, 0), (100, 0)])], Speed=["50 km/h"], AADT=["1200"], fclass=["main"])
    )
    assert g.attributes.loc[0, "speed_kmh"] == 50.0
    assert g.attributes.loc[0, "aadt"] == 1200.0
    assert g.attributes.loc[0, "road_class"] == "main"
    assert g.stats["attribute_columns"]["speed_kmh"] == "Speed"


def test_input_without_crs_is_refused():
    with pytest.raises(rg.RoadGraphError):
        rg.build_road_graph(gpd.GeoDataFrame(geometry=[LineString([(0, 0), (1, 1)])]))


# ----------------------------------------------------------------------------------------------
# CRS and lengths
# ----------------------------------------------------------------------------------------------


def test_geographic_input_gets_the_utm_zone_of_the_data():
    # SCHEMA.md: the demo region (about 40.6 N, 137.4 W) lies in UTM zone 8N, EPSG:32608.
    g = rg.build_road_graph(_gdf([LineString([(-137.4, 40.6), (-137.3, 40.65)])], crs="EPSG:4326"))
    assert g.crs == CRS.from_epsg(32608)


def test_wide_geographic_input_gets_an_azimuthal_equidistant_crs():
    crs = rg.metric_crs_for(
        np.array([LineString([(-120, 40), (-100, 41)])], dtype=object), "EPSG:4326"
    )
    assert crs.is_projected
    assert crs.coordinate_operation.method_name == "Azimuthal Equidistant"


def test_geodesic_edge_lengths_match_pyproj_geometry_length():
    """Reference: pyproj.Geod(ellps='WGS84').geometry_length (Karney 2013)."""
    geod = Geod(ellps="WGS84")
    rng = np.random.default_rng(3)
    lines = []
    for lat in (-33.0, 5.0, 40.6, 61.0):  # separate lines, far apart: no noding between them
        lon0 = -137.0 + rng.uniform(-1, 1)
        pts = np.c_[
            lon0 + np.cumsum(rng.uniform(0.005, 0.05, 6)),
            lat + np.cumsum(rng.uniform(-0.02, 0.02, 6)),
        ]
        lines.append(LineString(pts))
    for lat in (-33.0, 5.0, 40.6, 61.0):
        g = rg.build_road_graph(
            _gdf([ln for ln in lines if abs(ln.coords[0][1] - lat) < 1], crs="EPSG:4326")
        )
        ref = [geod.geometry_length(ln) for ln in lines if abs(ln.coords[0][1] - lat) < 1]
        assert g.length_method == "geodesic_wgs84"
        np.testing.assert_allclose(g.length_m, ref, rtol=1e-8)


def test_noded_geographic_lines_keep_their_geodesic_total():
    """Cutting two crossing lon/lat lines keeps Σ length = Σ Geod.geometry_length (the
    crossing is placed in UTM; the total may grow by the offset from the geodesic only)."""
    geod = Geod(ellps="WGS84")
    lines = [
        LineString([(-137.5, 40.5), (-137.2, 40.7)]),
        LineString([(-137.5, 40.7), (-137.2, 40.5)]),
    ]
    g = rg.build_road_graph(_gdf(lines, crs="EPSG:4326"))
    assert g.n_edges == 4
    ref = sum(geod.geometry_length(ln) for ln in lines)
    np.testing.assert_allclose(g.length_m.sum(), ref, rtol=1e-6)


def test_projected_input_keeps_its_crs_and_planar_lengths():
    g = rg.build_road_graph(_gdf([LineString([(0, 0), (30, 40)])]))
    assert g.crs == CRS.from_user_input(UTM)
    assert g.length_method == "planar"
    np.testing.assert_allclose(g.length_m, [50.0])


# ----------------------------------------------------------------------------------------------
# Routing
# ----------------------------------------------------------------------------------------------


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_shortest_paths_match_networkx_on_random_graphs(seed):
    """Reference: networkx.single_source_dijkstra_path_length on a MultiDiGraph of the same
    edges (parallel edges and one-way edges included)."""
    rng = np.random.default_rng(seed)
    n = 40
    xy = rng.uniform(0, 10_000, (n, 2))
    m = 120
    u = rng.integers(0, n, m)
    v = rng.integers(0, n, m)
    keep = u != v
    u, v = u[keep], v[keep]
    length = np.hypot(*(xy[u] - xy[v]).T) * rng.uniform(1.0, 1.5, u.size)
    oneway = rng.random(u.size) < 0.2
    g = rg.graph_from_edges(xy, u, v, length, crs=UTM, oneway=oneway)
    ref = nx.MultiDiGraph()
    ref.add_nodes_from(range(n))
    for a, b, w, o in zip(u, v, length, oneway, strict=True):
        ref.add_edge(int(a), int(b), weight=float(w))
        if not o:
            ref.add_edge(int(b), int(a), weight=float(w))
    srcs = rng.choice(n, 5, replace=False)
    dist = dijkstra(g.adjacency, directed=True, indices=srcs)
    for s, row in zip(srcs, dist, strict=True):
        expect = nx.single_source_dijkstra_path_length(ref, int(s), weight="weight")
        got = {j: row[j] for j in range(n) if np.isfinite(row[j])}
        assert set(got) == set(expect)
        for j, d in expect.items():
            assert got[j] == pytest.approx(d, rel=1e-12, abs=1e-9)


def test_noding_of_random_segments_agrees_with_geos_noding():
    """Independent noder: shapely.unary_union (GEOS) splits the same segments at every
    crossing; distances over both networks must agree (networkx on the GEOS pieces)."""
    rng = np.random.default_rng(7)
    segs = [LineString(rng.uniform(0, 1000, (2, 2))) for _ in range(25)]
    g = rg.build_road_graph(_gdf(segs), snap_tolerance_m=0.0)
    pieces = shapely.get_parts(shapely.unary_union(np.array(segs, dtype=object)))
    ref = nx.Graph()
    for p in pieces:
        a, b = p.coords[0], p.coords[-1]
        ref.add_edge(a, b, weight=p.length)
    ref_nodes = np.array(list(ref.nodes))
    tree = cKDTree(ref_nodes)
    dmatch, match = tree.query(g.node_xy)
    assert dmatch.max() < 1e-6
    assert g.n_nodes == ref.number_of_nodes()
    assert g.n_edges == ref.number_of_edges()
    dist = dijkstra(g.adjacency, directed=False, indices=[0, 1, 2])
    for row, s in zip(dist, [0, 1, 2], strict=True):
        expect = nx.single_source_dijkstra_path_length(ref, tuple(ref_nodes[match[s]]))
        for j in range(g.n_nodes):
            key = tuple(ref_nodes[match[j]])
            if key in expect:
                assert row[j] == pytest.approx(expect[key], rel=1e-9, abs=1e-6)
            else:
                assert not np.isfinite(row[j])


def _lattice_polylines(seed, n=120, side=12, max_vertices=4):
    """Random polylines on an integer lattice (×100 m): shared ends, lines through other
    lines' vertices, collinear overlaps and proper crossings all occur often."""
    rng = np.random.default_rng(seed)
    lines = []
    for _ in range(n):
        k = int(rng.integers(2, max_vertices + 1))
        pts = rng.integers(0, side, (k, 2)) * 100.0
        if len(np.unique(pts, axis=0)) == k:
            lines.append(LineString(pts))
    return lines


def _float_polylines(seed, n=150):
    """Random polylines in UTM-sized coordinates: short segments and a few kilometres-long
    ones (many grid cells), crossing at arbitrary points."""
    rng = np.random.default_rng(seed)
    lines = []
    for _ in range(n):
        k = int(rng.integers(2, 6))
        step = 5000.0 if rng.random() < 0.1 else 150.0
        p0 = np.array([X0, Y0 - 3000.0]) + rng.uniform(0, 3000, 2)
        pts = p0 + np.cumsum(rng.normal(0, step, (k, 2)), axis=0)
        lines.append(LineString(pts))
    return lines


def _touching_pairs(lines):
    pi, pj = shapely.STRtree(lines).query(lines, predicate="intersects")
    m = pi < pj
    return pi[m], pj[m]


def _meets_off_shared_vertices(a, b) -> bool:
    """GEOS: does the intersection of lines a and b hold a point that is not a vertex of both?"""
    pts = shapely.get_coordinates(shapely.intersection(a, b))
    va = {tuple(c) for c in shapely.get_coordinates(a)}
    vb = {tuple(c) for c in shapely.get_coordinates(b)}
    return any(tuple(c) not in va or tuple(c) not in vb for c in pts)


@pytest.mark.parametrize(
    "make,seed", [(_lattice_polylines, 0), (_lattice_polylines, 1), (_float_polylines, 2)]
)
def test_crossing_search_finds_every_pair_meeting_off_shared_vertices(make, seed):
    """GEOS (STRtree 'intersects' + shapely.intersection) as the reference: every pair of
    lines that meets at a point other than a vertex of both is a candidate; pairs that only
    share junction vertices are mostly left out."""
    lines = np.array(make(seed), dtype=object)
    xy, lid = shapely.get_coordinates(lines, return_index=True)
    starts, ends = rg._line_bounds(lid, lines.size)
    ci, cj = rg._crossing_candidates(xy, starts, ends, np.ones(lines.size, bool))
    cand = set(zip(ci.tolist(), cj.tolist(), strict=True))
    pi, pj = _touching_pairs(lines)
    needed = {
        (i, j)
        for i, j in zip(pi.tolist(), pj.tolist(), strict=True)
        if _meets_off_shared_vertices(lines[i], lines[j])
    }
    assert len(needed) > 10
    assert needed <= cand
    if make is _lattice_polylines:
        # integer coordinates: the orientation tests are exact, so no pair apart is a candidate
        assert cand <= set(zip(pi.tolist(), pj.tolist(), strict=True))
        assert len(cand) < pi.size  # pairs meeting only at shared vertices skip GEOS
    # inactive lines never appear
    active = np.arange(lines.size) % 3 != 0
    ai, aj = rg._crossing_candidates(xy, starts, ends, active)
    assert active[ai].all() and active[aj].all()
    assert set(zip(ai.tolist(), aj.tolist(), strict=True)) == {
        (i, j) for i, j in cand if active[i] and active[j]
    }


def _all_touching_pairs(xy, starts, ends, active, grid=None):
    """Reference candidate search: every touching pair of active lines, via GEOS."""
    lines = rg._lines_from_ranges(xy, starts, ends - starts + 1)
    pi, pj = _touching_pairs(lines)
    keep = active[pi] & active[pj]
    return pi[keep].astype(np.int64), pj[keep].astype(np.int64)


@pytest.mark.parametrize("make,seed", [(_lattice_polylines, 3), (_float_polylines, 4)])
def test_crossing_search_changes_no_graph(make, seed, monkeypatch):
    """The graph equals the one built by intersecting every touching pair of lines, on
    polylines full of junctions, overlaps and crossings."""
    kw = {"n": 150} if make is _lattice_polylines else {}
    lines = make(seed, **kw)
    gdf = _gdf(lines, bridge=np.arange(len(lines)) % 17 == 0)
    fast = rg.build_road_graph(gdf, snap_tolerance_m=0.0)
    monkeypatch.setattr(rg, "_crossing_candidates", _all_touching_pairs)
    full = rg.build_road_graph(gdf, snap_tolerance_m=0.0)
    np.testing.assert_array_equal(fast.node_xy, full.node_xy)
    np.testing.assert_array_equal(fast.u, full.u)
    np.testing.assert_array_equal(fast.v, full.v)
    np.testing.assert_array_equal(fast.length_m, full.length_m)
    assert fast.stats == full.stats
    assert fast.stats["intersections_noded"] > 10


def _dup_prone_lines(seed, n=400):
    """Short lattice polylines, many of them repeats, reversals, rotations of closed rings
    and near-repeats (one vertex moved, -0.0 for 0.0, a vertex more)."""
    rng = np.random.default_rng(seed)
    base = []
    for _ in range(60):
        k = int(rng.integers(2, 5))
        pts = rng.integers(-2, 3, (k, 2)).astype(float)
        if rng.random() < 0.2:
            pts = np.r_[pts, pts[:1]]  # closed
        base.append(pts)
    out = []
    for _ in range(n):
        pts = base[int(rng.integers(len(base)))].copy()
        r = rng.random()
        if r < 0.3:
            pts = pts[::-1]
        elif r < 0.4 and (pts[0] == pts[-1]).all() and len(pts) > 3:
            pts = np.r_[pts[1:-1], pts[1:2]]  # the same ring from its next vertex
        elif r < 0.5:
            pts[int(rng.integers(len(pts)))] += 0.5
        elif r < 0.55:
            pts = np.where(pts == 0.0, -0.0, pts)
        elif r < 0.6:
            pts = np.r_[pts, pts[-1:] + 1.0]
        out.append(pts)
    return out


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_duplicate_runs_match_geos_normalised_duplicates(seed):
    """Reference: GEOS ``normalize`` + WKB equality (the previous method, kept as
    ``_dedup_lines``) on lines with repeats, reversals, rotated rings and near-repeats."""
    pts = _dup_prone_lines(seed)
    count = np.array([len(p) for p in pts])
    xy = np.concatenate(pts)
    first = np.r_[0, np.cumsum(count)[:-1]]
    lines = np.array([LineString(p) for p in pts], dtype=object)
    expect = rg._dedup_lines(lines)
    assert 20 < (~expect).sum() < len(pts) - 20  # both kinds occur
    np.testing.assert_array_equal(rg._dedup_runs(xy, first, count), expect)
    # every hash equal: the exact comparison alone decides
    h, rev = rg._canonical_hash(xy, xy.view(np.int64), first, count)
    opened = np.flatnonzero(~(xy[first] == xy[first + count - 1]).all(axis=1))
    keep = rg._first_of_equal_runs(xy.view(np.int64), first, count, rev, np.zeros_like(h), opened)
    np.testing.assert_array_equal(keep, expect[opened])


def test_entry_index_finds_every_stored_entry_and_nothing_else():
    rng = np.random.default_rng(9)
    n = 30
    u, v = rng.integers(0, n, 90), rng.integers(0, n, 90)
    keep = u != v
    g = rg.graph_from_edges(
        rng.uniform(0, 1000, (n, 2)), u[keep], v[keep], crs=UTM, oneway=rng.random(keep.sum()) < 0.3
    )
    dense = g.adjacency.toarray()
    ti, hi = np.meshgrid(np.arange(n), np.arange(n), indexing="ij")
    pos = g.entry_index(ti.ravel(), hi.ravel())
    assert ((pos >= 0) == (dense.ravel() > 0)).all()
    np.testing.assert_array_equal(g.adjacency.data[pos[pos >= 0]], dense.ravel()[pos >= 0])
    assert (g.entry_index([-1, 0], [0, n]) == -1).all()


def test_parallel_edges_keep_the_shortest_in_the_adjacency():
    g = rg.graph_from_edges(
        [[0, 0], [100, 0]], [0, 0, 1], [1, 1, 0], [150.0, 120.0, 130.0], crs=UTM
    )
    assert g.adjacency[0, 1] == 120.0 and g.adjacency[1, 0] == 120.0
    assert g.entry_edge[g.entry_index([0], [1])[0]] == 1
    assert g.stats["parallel_entries_dropped"] == 4


# ----------------------------------------------------------------------------------------------
# Profiles
# ----------------------------------------------------------------------------------------------


def test_profile_of_a_planar_slope_is_analytic(tmp_path):
    """A plane z = 1000 + 0.05·(x − X0): bilinear interpolation reproduces it exactly, so an
    edge east over 2 km climbs 100 m at 5 % forward and 0 m backward (analytic)."""
    cell = 50.0
    cols, rows = 60, 20
    xc = X0 + (np.arange(cols) + 0.5) * cell
    z = np.tile(1000.0 + 0.05 * (xc - X0), (rows, 1))
    path = _dem(tmp_path, z, cell)
    y = Y0 - 500.0
    lines = [
        LineString([(X0 + 200, y), (X0 + 1200, y), (X0 + 2200, y)]),  # east, up
        LineString([(X0 + 2200, y), (X0 + 2200, y - 400)]),
    ]  # south along a contour
    g = rg.build_road_graph(_gdf(lines))
    with rasterio.open(path) as ds:
        prof = rg.edge_profiles(g, ds, climb_grade_threshold_pct=4.0)
    east = int(np.argmax(g.length_m))
    fwd = g.node_xy[g.v[east], 0] > g.node_xy[g.u[east], 0]
    up, down = ("forward", "reverse") if fwd else ("reverse", "forward")
    p = prof.loc[east]
    assert p[f"climb_{up}_m"] == pytest.approx(100.0, abs=1e-3)
    assert p[f"climb_{down}_m"] == pytest.approx(0.0, abs=1e-3)
    assert p[f"grade_{up}_pct"] == pytest.approx(5.0, abs=1e-4)
    assert p[f"sustained_length_{up}_m"] == pytest.approx(2000.0, abs=1e-6)
    assert p[f"sustained_climb_{up}_m"] == pytest.approx(100.0, abs=1e-3)
    assert p[f"sustained_length_{down}_m"] == 0.0
    assert p["elevation_min_m"] == pytest.approx(1010.0, abs=1e-3)
    assert p["elevation_max_m"] == pytest.approx(1110.0, abs=1e-3)
    assert p["elevation_mean_m"] == pytest.approx(1060.0, abs=1e-3)
    assert p["samples"] == 41  # 2000 m at the 50 m cell size
    # length quantiles of a linear profile: 1010 + 100·f, within half a 50 m segment (1.25 m)
    for col, f in zip(rg.PROFILE_QUANTILE_COLUMNS, rg.PROFILE_ELEVATION_FRACTIONS, strict=True):
        assert p[col] == pytest.approx(1010.0 + 100.0 * f, abs=1.3)
    contour = prof.loc[1 - east]
    assert contour["climb_forward_m"] == pytest.approx(0.0, abs=1e-3)
    assert contour["elevation_mean_m"] == pytest.approx(1110.0, abs=1e-3)


@pytest.mark.parametrize(("flat_m", "expected_m"), [(100.0, 2100.0), (400.0, 1000.0)])
def test_sustained_climb_tolerates_short_dips_only(tmp_path, flat_m, expected_m):
    """Profile (analytic, piecewise linear at cell centres): 6 % for 1000 m, flat for
    ``flat_m``, 6 % for 1000 m. A 100 m flat (= dip tolerance, 2 cells) is bridged: one
    climb of 2100 m rising 120 m; a 400 m flat splits it into two 1000 m climbs."""
    cell = 50.0
    s = np.arange(0, 2600, cell)  # distance of each cell centre from the first centre
    zz = np.where(
        s <= 1000, 0.06 * s, np.where(s <= 1000 + flat_m, 60.0, 60.0 + 0.06 * (s - 1000 - flat_m))
    )
    zz = np.minimum(zz, 120.0)
    z = np.tile(500.0 + zz, (10, 1))
    path = _dem(tmp_path, z, cell)
    x0 = X0 + 0.5 * cell
    y = Y0 - 5 * cell + 0.5 * cell
    line = LineString([(x0, y), (x0 + 2000 + flat_m, y)])
    g = rg.build_road_graph(_gdf([line]))
    with rasterio.open(path) as ds:
        prof = rg.edge_profiles(g, ds, climb_grade_threshold_pct=4.0)
    fwd = g.node_xy[g.v[0], 0] > g.node_xy[g.u[0], 0]
    up = "forward" if fwd else "reverse"
    assert prof.loc[0, f"sustained_length_{up}_m"] == pytest.approx(expected_m, abs=1e-6)
    assert prof.loc[0, f"sustained_climb_{up}_m"] == pytest.approx(
        120.0 if expected_m > 2000 else 60.0, abs=1e-3
    )
    assert prof.attrs["dip_tolerance_m"] == pytest.approx(100.0)


def test_profile_outside_the_dem_gives_nan_and_partial_share(tmp_path):
    path = _dem(tmp_path, np.full((10, 10), 700.0), 100.0)
    y = Y0 - 500.0
    g = rg.build_road_graph(
        _gdf(
            [
                LineString([(X0 + 500, y), (X0 + 1500, y)]),
                LineString([(X0 + 5000, y), (X0 + 6000, y)]),
            ]
        )
    )
    with rasterio.open(path) as ds:
        prof = rg.edge_profiles(g, ds)
    inside = int(np.argmin(g.node_xy[g.u, 0]))
    assert 0.4 < prof.loc[inside, "dem_valid_share"] < 0.7
    assert prof.loc[inside, "elevation_mean_m"] == pytest.approx(700.0)
    assert np.isnan(prof.loc[1 - inside, "elevation_mean_m"])
    assert prof.loc[1 - inside, "climb_forward_m"] == 0.0


def test_dem_spacing_of_a_geographic_dem(tmp_path):
    """3 arc-second cells at 45° N: Δφ·R = 92.66 m, Δλ·R·cos φ = 65.52 m (R = 6 371 008.8 m,
    computed by hand)."""
    path = _dem(
        tmp_path, np.zeros((20, 20)), 3 / 3600, crs="EPSG:4326", x0=10.0, y0=45.0 + 10 * 3 / 3600
    )
    with rasterio.open(path) as ds:
        assert rg.dem_spacing_m(ds) == pytest.approx(65.52, abs=0.01)


# ----------------------------------------------------------------------------------------------
# Snapping
# ----------------------------------------------------------------------------------------------


def test_snap_points_nearest_edge_and_flags_far_points():
    g = rg.build_road_graph(
        _gdf([LineString([(0, 0), (1000, 0)]), LineString([(1000, 0), (1000, 1000)])])
    )
    pts = np.array([[100, 30], [900, -20], [1010, 700], [5000, 5000], [np.nan, 0]])
    node, dist, ok = rg.snap_points(g, pts, 100.0)
    ref = shapely.distance(
        shapely.points(pts[:4]), shapely.union_all(np.array(g.geometry, dtype=object))
    )
    np.testing.assert_allclose(dist[:4], ref)
    np.testing.assert_allclose(g.node_xy[node[0]], [0, 0])
    np.testing.assert_allclose(g.node_xy[node[1]], [1000, 0])
    np.testing.assert_allclose(g.node_xy[node[2]], [1000, 1000])
    assert ok.tolist() == [True, True, True, False, False]
    assert node[3] >= 0 and node[4] == -1 and np.isnan(dist[4])


def test_accepts_the_dem_derived_fallback_network():
    """Lines from pipeline.terrain_routes (no road attributes, list-valued columns) build a
    connected graph whose segments meet at shared vertices."""
    from affine import Affine

    from pipeline.terrain_routes import build_terrain_routes

    z = np.fromfunction(lambda r, c: 1000 + 5 * c + 60 * np.sin(r / 3.0), (60, 60))
    net = build_terrain_routes(
        z,
        Affine(100, 0, X0, 0, -100, Y0),
        [(X0 + 500, Y0 - 500), (X0 + 5500, Y0 - 5500), (X0 + 5500, Y0 - 500)],
    )
    g = rg.build_road_graph(gpd.GeoDataFrame(net.records(), crs=UTM))
    assert g.n_edges == len(net.segments)
    assert g.stats["components"] == 1
    assert g.attributes["bridge"].sum() == 0 and not g.attributes["oneway"].any()


def _pandas_length_quantiles(value, seg_len, seg_edge, valid, n_edges, fractions):
    """Reference: numpy's stable lexsort and pandas' grouped cumulative sum."""
    import pandas as pd

    sel = np.flatnonzero(valid & (seg_len > 0))
    out = [np.full(n_edges, np.nan) for _ in fractions]
    order = np.lexsort((value[sel], seg_edge[sel]))
    se, sv, sl = seg_edge[sel][order], value[sel][order], seg_len[sel][order]
    cum = pd.Series(sl).groupby(se, sort=False).cumsum().to_numpy()
    last = np.r_[se[1:] != se[:-1], True]
    tot = np.zeros(n_edges)
    tot[se[last]] = cum[last]
    for o, f in zip(out, fractions, strict=True):
        hit = np.flatnonzero(cum >= f * tot[se])
        edges, first = np.unique(se[hit], return_index=True)
        o[edges] = sv[hit[first]]
    return out


@pytest.mark.parametrize("seed", [0, 1])
def test_length_quantiles_match_a_sort_and_grouped_cumsum(seed):
    """Reference: numpy lexsort + pandas groupby cumsum, on edges with ties in value, equal
    lengths (quantiles on segment boundaries), invalid and zero-length segments, long edges,
    edges without any valid segment and lengths of very different size."""
    rng = np.random.default_rng(seed)
    n_edges = 400
    per = rng.integers(1, 9, n_edges)
    per[::37] = 300  # long edges
    seg_edge = np.repeat(np.arange(n_edges), per)
    n = seg_edge.size
    value = np.round(rng.uniform(1000, 1010, n), 0)  # many ties
    seg_len = rng.choice([25.0, 25.0, 12.5, 1e-9, 0.0, 3e4], n)
    valid = rng.random(n) > 0.1
    valid[seg_edge == 5] = False
    fractions = (0.0, 0.1, 0.25, 0.5, 0.75, 0.9, 1.0)
    got = rg._length_quantiles(value, seg_len, seg_edge, valid, n_edges, fractions)
    want = _pandas_length_quantiles(value, seg_len, seg_edge, valid, n_edges, fractions)
    for g, w in zip(got, want, strict=True):
        np.testing.assert_array_equal(g, w)
    assert np.isnan(got[3][5]) and np.isfinite(got[3]).sum() > 300


def _strtree_points_near(pts, xy, starts, ends, lines, tol, grid=None):
    """Reference: GEOS via STRtree (dwithin, or intersects at tol 0) over the selected lines."""
    geoms = rg._lines_from_ranges(xy, starts, ends - starts + 1)
    targets = np.flatnonzero(lines)
    tree = shapely.STRtree(geoms[targets])
    p = shapely.points(pts)
    if tol > 0:
        qi, qj = tree.query(p, predicate="dwithin", distance=tol)
    else:
        qi, qj = tree.query(p, predicate="intersects")
    return qi.astype(np.int64), targets[qj].astype(np.int64)


def _strtree_touching(xy, starts, ends, flagged, grid=None):
    lines = rg._lines_from_ranges(xy, starts, ends - starts + 1)
    pi, pj = _touching_pairs(lines)
    keep = flagged[pi] | flagged[pj]
    return pi[keep].astype(np.int64), pj[keep].astype(np.int64)


@pytest.mark.parametrize("make,seed", [(_lattice_polylines, 5), (_float_polylines, 6)])
@pytest.mark.parametrize("tol", [0.0, 0.5, 40.0])
def test_grid_searches_cover_geos_queries(make, seed, tol):
    """GEOS (STRtree dwithin / intersects) as the reference: the grid's point-to-line and
    touching-pair candidates include every pair GEOS finds."""
    lines = np.array(make(seed), dtype=object)
    xy, lid = shapely.get_coordinates(lines, return_index=True)
    starts, ends = rg._line_bounds(lid, lines.size)
    rng = np.random.default_rng(seed)
    pts = np.r_[
        xy[starts], xy[ends], xy[rng.integers(0, len(xy), 50)] + rng.normal(0, 0.3, (50, 2))
    ]
    pts = np.r_[pts, xy[starts[:20]] + [tol * 0.999, 0.0]]  # just inside the tolerance
    sel = np.arange(lines.size) % 4 != 0
    gi, gj = rg._points_near_lines(pts, xy, starts, ends, sel, tol)
    ri, rj = _strtree_points_near(pts, xy, starts, ends, sel, tol)
    got = set(zip(gi.tolist(), gj.tolist(), strict=True))
    want = set(zip(ri.tolist(), rj.tolist(), strict=True))
    assert len(want) > 20 and want <= got
    assert len(got) <= len(want) + 0.05 * len(want) + 5  # few extra candidates for GEOS
    flagged = np.arange(lines.size) % 7 == 0
    ti, tj = rg._touching_candidates(xy, starts, ends, flagged)
    ri, rj = _strtree_touching(xy, starts, ends, flagged)
    assert set(zip(ri.tolist(), rj.tolist(), strict=True)) <= set(
        zip(ti.tolist(), tj.tolist(), strict=True)
    )
    assert flagged[ti].any() and (flagged[ti] | flagged[tj]).all()


def _messy_roads(seed):
    """Lattice and random-walk lines, a few nudged off the lattice, repeats, reversals,
    bridges and one-way lines: snapping, end joins, crossings and bridges all occur."""
    rng = np.random.default_rng(seed)
    lines = []
    for _ in range(300):
        k = int(rng.integers(2, 6))
        if rng.random() < 0.5:
            pts = rng.integers(0, 15, (k, 2)) * 100.0
            pts = pts + rng.normal(0, 0.3, (k, 2)) * (rng.random() < 0.3)
        else:
            pts = np.array([X0, Y0]) + np.cumsum(rng.normal(0, 300, (k, 2)), axis=0) + 700
        lines.append(LineString(pts))
    lines += lines[:15] + [LineString(np.asarray(ln.coords)[::-1]) for ln in lines[15:25]]
    n = len(lines)
    return _gdf(lines, bridge=rng.random(n) < 0.05, oneway=rng.random(n) < 0.1)


@pytest.mark.parametrize("seed,tol", [(0, 0.0), (1, 0.5), (2, 2.0)])
def test_grid_searches_change_no_graph(seed, tol, monkeypatch):
    """The graph equals the one built with GEOS STRtree queries for every search (end joins,
    crossings, bridges), with snapping, duplicates and bridges present."""
    gdf = _messy_roads(seed)
    fast = rg.build_road_graph(gdf, snap_tolerance_m=tol)
    monkeypatch.setattr(rg, "_crossing_candidates", _all_touching_pairs)
    monkeypatch.setattr(rg, "_points_near_lines", _strtree_points_near)
    monkeypatch.setattr(rg, "_touching_candidates", _strtree_touching)
    ref = rg.build_road_graph(gdf, snap_tolerance_m=tol)
    np.testing.assert_array_equal(fast.node_xy, ref.node_xy)
    np.testing.assert_array_equal(fast.u, ref.u)
    np.testing.assert_array_equal(fast.v, ref.v)
    np.testing.assert_array_equal(fast.length_m, ref.length_m)
    assert fast.stats == ref.stats
    s = fast.stats
    assert s["intersections_noded"] > 100 and s["duplicates_dropped"] > 0
    assert s["bridge_crossings_skipped"] > 0
    assert tol == 0 or (s["snapped_vertex_merges"] > 0 and s["endpoint_snaps"] > 0)


def test_entry_order_equals_a_four_key_lexsort():
    """Reference: numpy's lexsort on (row·n + col, length, edge id), many parallel edges."""
    rng = np.random.default_rng(11)
    n = 40
    rows, cols = rng.integers(0, n, 3000), rng.integers(0, n, 3000)
    lens = rng.choice([5.0, 5.0, 7.5, 12.0], 3000)
    eids = rng.permutation(3000)
    key = rows * np.int64(n) + cols
    np.testing.assert_array_equal(rg._entry_order(key, lens, eids), np.lexsort((eids, lens, key)))
    key = np.arange(50)[::-1].astype(np.int64)  # no ties at all
    np.testing.assert_array_equal(rg._entry_order(key, key * 1.0, key), np.argsort(key))


def test_graph_survives_the_stage_cache_unchanged(tmp_path):
    """A road graph stored by the stage cache (GeoParquet and Parquet tables read back) is
    rebuilt with every array, attribute and statistic equal, on messy roads with one-way
    lines, bridges and missing road classes; a class outside the pipeline is refused."""
    from pipeline import runner

    gdf = _messy_roads(3)
    gdf["road_class"] = np.where(np.arange(len(gdf)) % 3 == 0, None, "collector")
    g = rg.build_road_graph(gdf, snap_tolerance_m=0.5)
    names = runner._save(tmp_path, {"graph": g})
    back = runner._load(tmp_path, names)["graph"]
    assert isinstance(back, rg.RoadGraph) and back.crs == g.crs
    for name in ("node_xy", "u", "v", "length_m", "entry_edge", "entry_forward", "component"):
        np.testing.assert_array_equal(getattr(back, name), getattr(g, name))
    assert (back.adjacency != g.adjacency).nnz == 0
    np.testing.assert_array_equal(back.adjacency.indices, g.adjacency.indices)
    assert shapely.equals_exact(back.geometry, g.geometry, tolerance=0).all()
    assert back.attributes.equals(g.attributes)
    assert back.stats == g.stats and back.length_method == g.length_method
    assert g.attributes["oneway"].any() and g.attributes["bridge"].any()
    # only the pipeline's own classes are rebuilt from a cache folder
    desc = tmp_path / names[0]
    desc.write_text(desc.read_text().replace("pipeline.roadgraph.RoadGraph", "os.system"))
    with pytest.raises(ValueError, match="not a pipeline class"):
        runner._load(tmp_path, names)


def _segmentize_reference(geoms: np.ndarray, spacing: float):
    """The reference: GEOS's own densifier through shapely (``segmentize``)."""
    dens = shapely.segmentize(geoms, max_segment_length=spacing)
    return shapely.get_coordinates(dens, return_index=True)


@pytest.mark.parametrize("spacing", [0.37, 1.0, 2.5, 30.0, 1e6])
def test_densified_coordinates_equal_geos_segmentize_bit_for_bit(spacing):
    # Reference: shapely.segmentize (GEOS's Densifier), compared bit for bit. Lines with
    # random vertices, repeated vertices, segments exactly a multiple of the spacing long,
    # an empty line and a missing geometry.
    rng = np.random.default_rng(7)
    lines = [
        LineString(rng.uniform(-50, 50, size=(int(rng.integers(2, 9)), 2))) for _ in range(300)
    ]
    lines += [
        LineString([(0, 0), (0, 0), (3, 4), (3, 4), (10, 4)]),  # repeated vertices
        LineString([(0, 0), (10 * spacing, 0), (10 * spacing, 3 * spacing)]),  # exact multiples
        LineString(),
        None,
        LineString([(1e7, -1e7), (1e7 + 0.1, -1e7 + 123.4)]),  # large coordinates
    ]
    geoms = np.array(lines, dtype=object)
    xy, line = rg.densified_coordinates(geoms, spacing)
    ref_xy, ref_line = _segmentize_reference(geoms, spacing)
    assert xy.shape == ref_xy.shape
    assert np.array_equal(xy.view(np.int64), ref_xy.view(np.int64))  # same bits
    assert np.array_equal(line, ref_line)


def test_densified_coordinates_leave_other_geometries_to_geos():
    # a MultiLineString is densified part by part by GEOS; concatenating its parts would add
    # a segment between them, so it takes GEOS's own path (reference: shapely.segmentize)
    geoms = np.array(
        [MultiLineString([[(0, 0), (5, 0)], [(9, 9), (9, 20)]]), LineString([(0, 0), (0, 7)])],
        dtype=object,
    )
    xy, line = rg.densified_coordinates(geoms, 2.0)
    ref_xy, ref_line = _segmentize_reference(geoms, 2.0)
    assert np.array_equal(xy, ref_xy) and np.array_equal(line, ref_line)
    # a line of one repeated vertex: GEOS refuses to make it, and so does this
    zero = np.array([LineString([(1, 1), (1, 1)])], dtype=object)
    with pytest.raises(shapely.errors.GEOSException):
        _segmentize_reference(zero, 2.0)
    with pytest.raises(shapely.errors.GEOSException):
        rg.densified_coordinates(zero, 2.0)
    # a spacing that is not positive: refused as GEOS refuses it
    line = np.array([LineString([(0, 0), (0, 7)])], dtype=object)
    for spacing in (0.0, -1.0):
        with pytest.raises(shapely.errors.GEOSException):
            _segmentize_reference(line, spacing)
        with pytest.raises(shapely.errors.GEOSException):
            rg.densified_coordinates(line, spacing)
