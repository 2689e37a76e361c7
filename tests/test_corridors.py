"""Descent corridors (pipeline.corridors).

Outside references: networkx shortest paths walked per destination (the slow, obvious
implementation of the same flows), networkx descendants for subtree sums, closed-form
integrals of the tank model on a straight road, and behaviour on tiny synthetic terrains
written as GeoTIFFs. The fleet requirement models below are invented test models, not the
project's fleet model.
"""

from __future__ import annotations

import geopandas as gpd
import networkx as nx
import numpy as np
import pandas as pd
import pydantic
import pytest
import rasterio
from rasterio.transform import from_origin
from shapely.geometry import LineString

from pipeline import corridors as co
from pipeline import roadgraph as rg

UTM = "EPSG:32608"  # demo-region CRS (SCHEMA.md)
X0, Y0 = 300_000.0, 4_500_000.0  # demo-region upper-left corner (SCHEMA.md)


def toy_requirement(elev, grade, climb):
    """Invented test fleet: 88.5 AKI at sea level, −1 AKI per 350 m of elevation, +0.15 AKI
    per % of uphill grade, +1 AKI per 400 m of sustained climb (not the project's model)."""
    return 88.5 - np.asarray(elev) / 350.0 + 0.15 * np.asarray(grade) + np.asarray(climb) / 400.0


def severe_requirement(elev, grade, climb):
    """Invented test fleet that needs more than 85 AKI everywhere below 3 km."""
    return toy_requirement(elev, grade, climb) + 7.5


def flat_profiles(graph, elevation_m=0.0, grade_pct=0.0, climb_m=0.0):
    m = graph.n_edges
    elev = np.broadcast_to(np.asarray(elevation_m, dtype=float), (m,))
    return pd.DataFrame(
        {
            "elevation_min_m": elev,
            "elevation_mean_m": elev,
            "elevation_max_m": elev,
            **{c: elev for c in rg.PROFILE_QUANTILE_COLUMNS},
            "climb_forward_m": 0.0,
            "climb_reverse_m": 0.0,
            "grade_forward_pct": grade_pct,
            "grade_reverse_pct": grade_pct,
            "sustained_length_forward_m": 0.0,
            "sustained_climb_forward_m": climb_m,
            "sustained_length_reverse_m": 0.0,
            "sustained_climb_reverse_m": climb_m,
        }
    )


def line_graph(n_nodes, spacing_m):
    xy = np.c_[np.arange(n_nodes) * spacing_m, np.zeros(n_nodes)]
    return rg.graph_from_edges(xy, np.arange(n_nodes - 1), np.arange(1, n_nodes), crs=UTM)


def random_graph(seed, n=50, m=140):
    rng = np.random.default_rng(seed)
    xy = rng.uniform(0, 50_000, (n, 2))
    u = rng.integers(0, n, m)
    v = rng.integers(0, n, m)
    keep = u != v
    u, v = u[keep], v[keep]
    length = np.hypot(*(xy[u] - xy[v]).T) * rng.uniform(1.0, 1.4, u.size)
    oneway = rng.random(u.size) < 0.15
    return rg.graph_from_edges(xy, u, v, length, crs=UTM, oneway=oneway), rng


#: Both ways of growing the trees (one per source; one per destination on the reverse graph)
#: must meet every outside reference below.
ROOTS = ["sources", "destinations"]


# ----------------------------------------------------------------------------------------------
# Building blocks
# ----------------------------------------------------------------------------------------------


def test_subtree_sums_match_networkx_descendants():
    rng = np.random.default_rng(5)
    k = 300
    parent = np.array([-1] + [int(rng.integers(0, i)) for i in range(1, k)])
    parent[rng.choice(np.arange(1, k), 5, replace=False)] = -1  # a forest
    w = rng.uniform(0, 10, k)
    tree = nx.DiGraph()
    tree.add_nodes_from(range(k))
    tree.add_edges_from((int(p), c) for c, p in enumerate(parent) if p >= 0)
    expect = np.array([w[i] + sum(w[j] for j in nx.descendants(tree, i)) for i in range(k)])
    np.testing.assert_allclose(co.subtree_sums(parent, w), expect, rtol=1e-12)


def test_subtree_sums_of_a_deep_chain():
    k = 5000  # depth 4999: 13 pointer-jumping rounds
    parent = np.arange(-1, k - 1)
    np.testing.assert_allclose(co.subtree_sums(parent, np.ones(k)), np.arange(k, 0, -1))


def test_tank_share_is_linear_to_zero_at_the_range():
    np.testing.assert_allclose(co.tank_share([0, 250e3, 500e3, 700e3], 500e3), [1, 0.5, 0, 0])


def test_params_are_frozen_and_reject_unknown_keys_and_models():
    p = co.CorridorParams()
    with pytest.raises(pydantic.ValidationError):
        p.tank_range_km = 600.0
    with pytest.raises(pydantic.ValidationError, match="tank_range"):
        co.CorridorParams(tank_range=600.0)
    with pytest.raises(pydantic.ValidationError, match="exponential.*power"):
        co.CorridorParams(decay_model="lognormal")
    assert 480.0 <= p.tank_range_km <= 640.0  # DOMAIN.md §4: a tank takes a car 480–640 km


# ----------------------------------------------------------------------------------------------
# Flows
# ----------------------------------------------------------------------------------------------


def _networkx_flows(graph, sources, dests, params):
    """The obvious implementation: networkx Dijkstra paths, gravity shares, and every
    destination's volume walked along its path. Returns {(from, to): flow}, delivered."""
    ref = nx.MultiDiGraph()
    ref.add_nodes_from(range(graph.n_nodes))
    for e in range(graph.n_edges):
        a, b, w = int(graph.u[e]), int(graph.v[e]), float(graph.length_m[e])
        ref.add_edge(a, b, weight=w)
        if not graph.attributes["oneway"][e]:
            ref.add_edge(b, a, weight=w)
    r_m = params.tank_range_km * 1000
    flows: dict[tuple[int, int], float] = {}
    delivered = []
    for s, vol in zip(sources["node"], sources["volume_l"], strict=True):
        dist, paths = nx.single_source_dijkstra(ref, int(s), cutoff=r_m, weight="weight")
        g = np.array(
            [
                w * np.exp(-dist[j] / 1000 / params.decay_km) if j in dist else 0.0
                for j, w in zip(dests["node"], dests["weight"], strict=True)
            ]
        )
        q = vol * g / g.sum()
        delivered.append(q.sum())
        for j, qj in zip(dests["node"], q, strict=True):
            if qj == 0:
                continue
            path = paths[int(j)]
            for a, b in zip(path[:-1], path[1:], strict=True):
                flows[(a, b)] = flows.get((a, b), 0.0) + qj
    return flows, np.array(delivered)


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
@pytest.mark.parametrize("root", ROOTS)
def test_flows_equal_networkx_paths_walked_per_destination(seed, root):
    graph, rng = random_graph(seed)
    comp = graph.component
    big = np.bincount(comp).argmax()
    nodes = np.flatnonzero(comp == big)
    srcs = rng.choice(nodes, 4, replace=False)
    dsts = rng.choice(nodes, 8, replace=False)
    sources = pd.DataFrame({"node": srcs, "volume_l": rng.uniform(1e3, 1e4, 4), "aki": 85.0})
    dests = pd.DataFrame({"node": dsts, "weight": rng.uniform(100, 5000, 8)})
    params = co.CorridorParams(tank_range_km=1e4)  # everything within range
    res = co.compute_corridors(
        graph, flat_profiles(graph), sources, dests, toy_requirement, params, tree_root=root
    )
    expect, delivered = _networkx_flows(graph, sources, dests, params)
    got = {
        (int(a), int(b)): f
        for a, b, f in zip(
            res.edges["from_node"], res.edges["to_node"], res.edges["flow_l_per_month"], strict=True
        )
    }
    assert set(got) == set(expect)
    for key, f in expect.items():
        assert got[key] == pytest.approx(f, rel=1e-9)
    np.testing.assert_allclose(res.stations["delivered_l_per_month"], delivered, rtol=1e-9)


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("root", ROOTS)
def test_flows_are_conserved_per_source(seed, root):
    """sent = delivered + beyond_range per source (to 1e-9 relative), with a short tank range
    so that part of the volume is beyond range, plus unsnapped and compliant stations."""
    graph, rng = random_graph(seed, n=80, m=200)
    ns = 12
    st = pd.DataFrame(
        {
            "node": rng.choice(graph.n_nodes, ns, replace=False),
            "volume_l": rng.uniform(1e3, 1e5, ns),
            "aki": np.where(rng.random(ns) < 0.7, 85.0, 87.0),
        }
    )
    st.loc[0, "node"] = -1
    st.loc[0, "aki"] = 85.0
    params = co.CorridorParams(tank_range_km=25.0, decay_km=20.0)
    res = co.compute_corridors(
        graph, flat_profiles(graph), st, None, toy_requirement, params, tree_root=root
    )
    s = res.stations
    src = s["status"] == "source"
    assert src.sum() >= 3
    assert (s.loc[src, "beyond_range_l_per_month"] > 0).any()
    np.testing.assert_allclose(
        s.loc[src, "delivered_l_per_month"] + s.loc[src, "beyond_range_l_per_month"],
        s.loc[src, "sent_l_per_month"],
        rtol=1e-9,
    )
    np.testing.assert_allclose(s.loc[src, "sent_l_per_month"], s.loc[src, "volume_l_per_month"])
    assert s.loc[0, "status"] == "not_snapped"
    assert s.loc[0, "unrouted_l_per_month"] == s.loc[0, "volume_l_per_month"]
    assert (s.loc[s["aki"] >= 87, "sent_l_per_month"] == 0).all()
    assert len(s) == ns  # never dropped


def test_a_large_unreachable_part_of_the_graph_changes_nothing():
    """The same network alone and beside a bigger disconnected one (of which no node is ever
    reached)."""
    graph, rng = random_graph(4, n=40, m=120)
    far = rg.graph_from_edges(
        np.c_[np.arange(100) * 1000.0 + 1e6, np.zeros(100)],
        np.arange(99),
        np.arange(1, 100),
        crs=UTM,
    )
    both = rg.graph_from_edges(
        np.r_[graph.node_xy, far.node_xy],
        np.r_[graph.u, far.u + 40],
        np.r_[graph.v, far.v + 40],
        np.r_[graph.length_m, far.length_m],
        crs=UTM,
        oneway=np.r_[graph.attributes["oneway"], np.zeros(99, bool)],
    )
    st = pd.DataFrame(
        {
            "node": rng.choice(40, 8, replace=False),
            "volume_l": rng.uniform(1e3, 1e4, 8),
            "aki": 85.0,
        }
    )
    params = co.CorridorParams(tank_range_km=60.0)
    a = co.compute_corridors(graph, flat_profiles(graph), st, None, toy_requirement, params)
    b = co.compute_corridors(both, flat_profiles(both), st, None, toy_requirement, params)
    assert (b.stations["nodes_reached"] <= graph.n_nodes).all()
    pd.testing.assert_frame_equal(a.edges, b.edges)
    pd.testing.assert_frame_equal(a.stations, b.stations)


@pytest.mark.parametrize("root", ROOTS)
def test_gravity_split_follows_the_decay_models(root):
    """Source in the middle of a straight road, destinations 20 km west and 50 km east:
    q_w / q_e = w_w f(20) / (w_e f(50)) — exponential and power decay (analytic)."""
    g = line_graph(8, 10_000.0)  # nodes at 0, 10, …, 70 km
    sources = pd.DataFrame({"node": [2], "volume_l": [1000.0], "aki": [85.0]})
    dests = pd.DataFrame({"node": [0, 7], "weight": [300.0, 900.0]})
    for params, f in [
        (co.CorridorParams(decay_km=40.0), lambda d: np.exp(-d / 40.0)),
        (co.CorridorParams(decay_model="power", decay_exponent=1.5), lambda d: d**-1.5),
    ]:
        res = co.compute_corridors(
            g, flat_profiles(g), sources, dests, toy_requirement, params, tree_root=root
        )
        e = res.edges.set_index(["from_node", "to_node"])["flow_l_per_month"]
        qw, qe = e[(2, 1)], e[(2, 3)]
        assert qw / qe == pytest.approx(300 * f(20.0) / (900 * f(50.0)), rel=1e-12)
        assert qw + qe == pytest.approx(1000.0, rel=1e-12)


@pytest.mark.parametrize("root", ROOTS)
def test_own_station_is_not_a_destination(root):
    g = line_graph(3, 10_000.0)
    st = pd.DataFrame(
        {"node": [0, 0, 2], "volume_l": [1000.0, 5000.0, 1000.0], "aki": [85.0, 87.0, 87.0]}
    )
    res = co.compute_corridors(g, flat_profiles(g), st, None, toy_requirement, tree_root=root)
    # station 0 sends to station 1 (same node, d = 0) and station 2 (20 km), not to itself
    w1, w2 = 5000.0, 1000.0 * np.exp(-20.0 / co.CorridorParams().decay_km)
    edge = res.edges.set_index(["from_node", "to_node"])["flow_l_per_month"]
    assert edge[(0, 1)] == pytest.approx(1000.0 * w2 / (w1 + w2), rel=1e-12)


# ----------------------------------------------------------------------------------------------
# Tank model and risk on a straight road (closed forms)
# ----------------------------------------------------------------------------------------------


@pytest.mark.parametrize("root", ROOTS)
def test_export_risk_and_deficit_share_match_the_closed_form(root):
    """Road of 20 edges × 10 km, source at 0 km, one destination at 200 km, R = 500 km.
    The first 10 edges are high (no deficit), the last 10 low (deficit δ = req − 85).
    VD = V ∫ σ dx, σ = 1 − x/R; risk = VD_low · δ / R_km; share in deficit = VD_low / VD."""
    g = line_graph(21, 10_000.0)
    elev = np.where(np.arange(20) < 10, 3000.0, 0.0)
    prof = flat_profiles(g, elevation_m=elev)
    v, r, aki = 4000.0, 500.0, 85.0
    sources = pd.DataFrame({"node": [0], "volume_l": [v], "aki": [aki]})
    dests = pd.DataFrame({"node": [20], "weight": [1.0]})
    res = co.compute_corridors(
        g, prof, sources, dests, toy_requirement, co.CorridorParams(tank_range_km=r), tree_root=root
    )

    def integral(a, b):
        return (b - a) - (b * b - a * a) / (2 * r)

    delta = toy_requirement(0.0, 0.0, 0.0) - aki
    vd_all = v * integral(0, 200)
    vd_low = v * integral(100, 200)
    st = res.stations.iloc[0]
    assert st["volume_distance_l_km_per_month"] == pytest.approx(vd_all, rel=1e-12)
    assert st["export_risk_l_aki_per_month"] == pytest.approx(vd_low * delta / r, rel=1e-12)
    assert st["fuel_share_in_deficit"] == pytest.approx(vd_low / vd_all, rel=1e-12)
    last = res.edges.set_index("edge").loc[19]
    assert last["tank_share"] == pytest.approx(1 - 195 / r, rel=1e-12)
    assert last["distance_km"] == pytest.approx(195.0, rel=1e-12)
    assert last["deficit_aki"] == pytest.approx(delta, rel=1e-12)


@pytest.mark.parametrize("root", ROOTS)
def test_long_edge_down_a_grade_is_scored_on_its_low_part(root):
    """One 50 km edge whose five length bins lie at 0, 0, 1000, 2000, 3000 m (mean 1200 m).
    The toy fleet needs 88.5, 88.5, 85.6, 82.8, 79.9 AKI there: with 85 AKI fuel the bins
    in deficit are the first three, so 3/5 of the volume-distance is in deficit and
    D = (3.5 + 3.5 + 0.643)/5 (hand computation); at the mean elevation D would be 0.07."""
    g = line_graph(2, 50_000.0)
    prof = flat_profiles(g, elevation_m=1200.0)
    for c, z in zip(rg.PROFILE_QUANTILE_COLUMNS, [0.0, 0.0, 1000.0, 2000.0, 3000.0], strict=True):
        prof[c] = z
    sources = pd.DataFrame({"node": [0], "volume_l": [1000.0], "aki": [85.0]})
    dests = pd.DataFrame({"node": [1], "weight": [1.0]})
    res = co.compute_corridors(g, prof, sources, dests, toy_requirement, tree_root=root)
    expect = (3.5 + 3.5 + (88.5 - 1000 / 350 - 85.0)) / 5
    assert res.edges["deficit_aki"].iloc[0] == pytest.approx(expect, rel=1e-12)
    assert res.stations["fuel_share_in_deficit"].iloc[0] == pytest.approx(0.6, rel=1e-12)
    mean = co.compute_corridors(
        g,
        prof,
        sources,
        dests,
        toy_requirement,
        co.CorridorParams(requirement_elevation="mean"),
        tree_root=root,
    )
    assert mean.edges["deficit_aki"].iloc[0] == pytest.approx(88.5 - 1200 / 350 - 85.0)


def test_refill_dilution_blends_the_tank_towards_local_fuel():
    """ρ = 1: at the midpoint 250 km of a 500 km range, σ = 0.5, so the tank holds
    0.5·85 + 0.5·87 = 86 AKI (linear blending by volume; DOMAIN.md §2)."""
    g = line_graph(3, 250_000.0)
    sources = pd.DataFrame({"node": [0], "volume_l": [1000.0], "aki": [85.0]})
    dests = pd.DataFrame({"node": [2], "weight": [1.0]})
    res = co.compute_corridors(
        g,
        flat_profiles(g),
        sources,
        dests,
        toy_requirement,
        co.CorridorParams(tank_range_km=600.0, refill_dilution=1.0),
        local_aki=np.array([87.0, 87.0]),
    )
    e = res.edges.set_index("edge")
    share = 1 - 375.0 / 600.0  # midpoint of the second edge
    assert e.loc[1, "tank_aki"] == pytest.approx(share * 85 + (1 - share) * 87, rel=1e-12)
    none = co.compute_corridors(
        g, flat_profiles(g), sources, dests, toy_requirement, co.CorridorParams(tank_range_km=600.0)
    )
    assert none.edges.set_index("edge").loc[1, "tank_aki"] == 85.0
    assert (
        none.stations["export_risk_l_aki_per_month"].iloc[0]
        > res.stations["export_risk_l_aki_per_month"].iloc[0]
    )


@pytest.mark.parametrize("root", ROOTS)
def test_corridor_lines_merge_directions(root):
    g = line_graph(4, 10_000.0)
    st = pd.DataFrame({"node": [0, 3], "volume_l": [1000.0, 2000.0], "aki": [85.0, 85.0]})
    res = co.compute_corridors(g, flat_profiles(g), st, None, toy_requirement, tree_root=root)
    lines = co.corridor_lines(g, res)
    assert len(lines) == 3
    assert set(lines["direction"]) == {"both"}
    np.testing.assert_allclose(lines["flow_l_per_month"], 3000.0)
    np.testing.assert_allclose(lines["flow_forward_l_per_month"], 1000.0)
    assert (lines["sources_count"] == 2).all()
    assert lines.crs == g.crs


def test_profiles_of_another_graph_are_refused():
    g = line_graph(4, 1000.0)
    with pytest.raises(co.CorridorError):
        co.compute_corridors(
            g,
            flat_profiles(line_graph(3, 1000.0)),
            pd.DataFrame({"node": [0], "volume_l": [1.0], "aki": [85.0]}),
            None,
            toy_requirement,
        )


# ----------------------------------------------------------------------------------------------
# Behaviour on synthetic terrains
# ----------------------------------------------------------------------------------------------


def _write_dem(path, z, cell_m):
    with rasterio.open(
        path,
        "w",
        driver="GTiff",
        width=z.shape[1],
        height=z.shape[0],
        count=1,
        dtype="float32",
        crs=UTM,
        transform=from_origin(X0, Y0, cell_m, cell_m),
        nodata=-9999.0,
        tiled=True,
        blockxsize=32,
        blockysize=32,
    ) as ds:
        ds.write(z.astype("float32"), 1)
    return path


def _run(tmp_path, dem, cell_m, lines, stations_xy, aki, towns_xy, pops, requirement):
    path = _write_dem(tmp_path / "dem.tif", dem, cell_m)
    graph = rg.build_road_graph(gpd.GeoDataFrame(geometry=lines, crs=UTM))
    with rasterio.open(path) as ds:
        prof = rg.edge_profiles(graph, ds)
    s_node, _, s_ok = rg.snap_points(graph, np.asarray(stations_xy), 200.0)
    t_node, _, t_ok = rg.snap_points(graph, np.asarray(towns_xy), 200.0)
    assert s_ok.all() and t_ok.all()
    sources = pd.DataFrame({"node": s_node, "volume_l": 50_000.0, "aki": aki})
    dests = pd.DataFrame({"node": t_node, "weight": pops})
    res = co.compute_corridors(graph, prof, sources, dests, requirement)
    return graph, prof, res


@pytest.fixture(scope="module")
def plateau_and_plain():
    """40 km × 10 km at 100 m cells: plateau 2,500 m for x < 8 km, a descent to 300 m at
    x = 33 km (8.8 %), plain beyond (SCHEMA.md relief)."""
    cell = 100.0
    xc = (np.arange(400) + 0.5) * cell
    z1 = np.interp(xc, [0, 8000, 33000, 40000], [2500, 2500, 300, 300])
    dem = np.tile(z1, (100, 1))
    y_a, y_b = Y0 - 2000.0, Y0 - 8000.0
    lines = [
        # station A's roads: plateau only
        LineString([(X0 + 1000, y_a), (X0 + 7000, y_a)]),
        LineString([(X0 + 4000, y_a), (X0 + 4000, y_a + 1500)]),
        # station B's road: from the top of the descent down to the plain
        LineString([(X0 + 7500, y_b), (X0 + 20000, y_b), (X0 + 39000, y_b)]),
    ]
    stations = [(X0 + 1000, y_a), (X0 + 7500, y_b)]
    towns = [(X0 + 7000, y_a), (X0 + 4000, y_a + 1500), (X0 + 39000, y_b)]
    return dem, cell, lines, stations, towns


def test_station_above_a_descent_exports_far_more_risk(tmp_path, plateau_and_plain):
    dem, cell, lines, stations, towns = plateau_and_plain
    _, _, res = _run(
        tmp_path,
        dem,
        cell,
        lines,
        stations,
        [85.0, 85.0],
        towns,
        [5000, 3000, 20000],
        toy_requirement,
    )
    risk = res.stations["export_risk_l_aki_per_month"].to_numpy()
    assert risk[1] > 0
    assert risk[0] < 0.05 * risk[1]
    assert res.stations["fuel_share_in_deficit"].iloc[1] > 0.2
    # both send the same volume: the difference is where it goes, not how much
    np.testing.assert_allclose(res.stations["sent_l_per_month"], 50_000.0)


def test_raising_the_fuel_to_the_standard_removes_its_corridor(tmp_path, plateau_and_plain):
    dem, cell, lines, stations, towns = plateau_and_plain
    graph, _, res = _run(
        tmp_path,
        dem,
        cell,
        lines,
        stations,
        [85.0, 87.0],
        towns,
        [5000, 3000, 20000],
        toy_requirement,
    )
    st = res.stations.iloc[1]
    assert st["export_risk_l_aki_per_month"] == 0.0
    assert st["sent_l_per_month"] == 0.0 and st["status"] == "meets_standard"
    lines_out = co.corridor_lines(graph, res)
    comp_b = graph.component[rg.snap_points(graph, np.array([stations[1]]), 200.0)[0][0]]
    assert not (graph.component[lines_out["u"].to_numpy()] == comp_b).any()
    # with both at the standard there is no corridor at all
    graph, _, res = _run(
        tmp_path,
        dem,
        cell,
        lines,
        stations,
        [87.0, 87.0],
        towns,
        [5000, 3000, 20000],
        toy_requirement,
    )
    assert len(co.corridor_lines(graph, res)) == 0
    assert res.stations["export_risk_l_aki_per_month"].sum() == 0.0


@pytest.mark.parametrize("requirement", [toy_requirement, severe_requirement])
def test_a_climb_low_down_scores_above_the_same_climb_high_up(tmp_path, requirement):
    """Two identical 6 % ramps, one from 200 m, one from 2,200 m; a station at the foot of
    each sends the same fuel to a town at the top."""
    cell = 100.0
    xc = (np.arange(60) + 0.5) * cell
    ramp = np.interp(xc, [0, 500, 4500, 6000], [0, 0, 240, 240])
    dem = np.vstack([np.tile(2200.0 + ramp, (50, 1)), np.tile(200.0 + ramp, (50, 1))])
    y_hi, y_lo = Y0 - 2500.0, Y0 - 7500.0
    lines = [LineString([(X0 + 500, y), (X0 + 2500, y), (X0 + 4500, y)]) for y in (y_hi, y_lo)]
    stations = [(X0 + 500, y_hi), (X0 + 500, y_lo)]
    towns = [(X0 + 4500, y_hi), (X0 + 4500, y_lo)]
    graph, prof, res = _run(
        tmp_path, dem, cell, lines, stations, [85.0, 85.0], towns, [1000, 1000], requirement
    )
    up = np.r_[prof["climb_forward_m"], prof["climb_reverse_m"]].max()
    # each road is one 4 km edge climbing 240 m; bilinear sampling rounds off the ramp's kinks
    assert up == pytest.approx(240.0, abs=5.0)
    risk = res.stations["export_risk_l_aki_per_month"].to_numpy()
    assert risk[1] > risk[0]
    if requirement is severe_requirement:
        assert risk[0] > 0
    # the climbing direction is what is scored: same flows, so the deficit explains it
    by_y = res.edges.assign(y=graph.node_xy[res.edges["from_node"], 1])
    lo = by_y[by_y["y"] < Y0 - 5000]["deficit_aki"].mean()
    hi = by_y[by_y["y"] > Y0 - 5000]["deficit_aki"].mean()
    assert lo > hi


# ----------------------------------------------------------------------------------------------
# Trees rooted at the destinations
# ----------------------------------------------------------------------------------------------


def _frames_close(a: pd.DataFrame, b: pd.DataFrame, keys: list[str]) -> None:
    m = a.merge(b, on=keys, how="outer", suffixes=("_a", "_b"), indicator=True)
    assert (m["_merge"] == "both").all(), "the two methods load different edge-directions"
    for c in a.columns.difference(keys):
        x, y = m[f"{c}_a"].to_numpy(), m[f"{c}_b"].to_numpy()
        if x.dtype.kind == "f":
            np.testing.assert_allclose(x, y, rtol=1e-9, atol=1e-9, err_msg=c)
        else:
            np.testing.assert_array_equal(x, y, err_msg=c)


@pytest.mark.parametrize("seed", [0, 1, 2, 3, 4, 5])
def test_destination_trees_give_the_sums_of_source_trees(seed):
    """Random graphs with one-way edges and continuous lengths (shortest paths unique): one
    tree per destination node on the reverse graph gives every station and edge-direction
    result of one tree per source (itself checked against networkx above) to 1e-9, with
    several grades, candidate grades, two destinations on one node, a destination that is
    the source itself (skipped by id), destinations beyond the range and both decay models."""
    graph, rng = random_graph(seed, n=80, m=220)
    m = graph.n_edges
    elev = rng.uniform(0, 2500, m)
    prof = flat_profiles(graph, elevation_m=elev, grade_pct=rng.uniform(0, 9, m))
    for k, c in enumerate(rg.PROFILE_QUANTILE_COLUMNS):
        prof[c] = elev + 150.0 * (k - 2)
    prof.loc[prof.index[:3], "elevation_p50_m"] = np.nan  # unknown requirement on 3 edges
    ns = 16
    st = pd.DataFrame(
        {
            "node": rng.choice(graph.n_nodes, ns, replace=True),
            "volume_l": rng.uniform(1e3, 1e5, ns),
            "aki": rng.choice([85.0, 85.5, 86.0, 88.0], ns),
            "id": [f"s{i}" for i in range(ns)],
        }
    )
    st.loc[0, "node"] = -1
    towns = pd.DataFrame(
        {
            "node": np.r_[rng.choice(graph.n_nodes, 5), st["node"].iloc[3], st["node"].iloc[3]],
            "weight": rng.uniform(1e3, 1e4, 7),
            "id": ["t0", "t1", "t2", "t3", "t4", "s3", "t6"],
        }
    )
    params = co.CorridorParams(
        tank_range_km=45.0, decay_km=20.0, decay_model="power" if seed % 2 else "exponential"
    )
    loaded, beyond = 0, False
    for dests in (towns, None):
        kw = {"candidate_aki": np.arange(80.0, 87.0, 0.5), "sources_per_partition": 5}
        a = co.compute_corridors(
            graph, prof, st, dests, toy_requirement, params, tree_root="sources", **kw
        )
        b = co.compute_corridors(
            graph, prof, st, dests, toy_requirement, params, tree_root="destinations", **kw
        )
        assert a.summary["tree_root"] == "sources" and b.summary["tree_root"] == "destinations"
        _frames_close(
            a.stations.drop(columns="nodes_reached").reset_index(),
            b.stations.drop(columns="nodes_reached").reset_index(),
            ["index"],
        )
        _frames_close(a.edges, b.edges, ["edge", "direction"])
        np.testing.assert_allclose(
            a.candidate_share_in_deficit, b.candidate_share_in_deficit, rtol=1e-9, atol=1e-12
        )
        assert (b.stations["nodes_reached"] == 0).all()
        loaded += len(a.edges)
        beyond |= bool((a.stations["beyond_range_l_per_month"] > 0).any())
    assert loaded > 10 and beyond  # the case exercises flows and the beyond-range share


def test_auto_roots_trees_at_the_fewer_end_and_only_without_dilution():
    g = line_graph(6, 10_000.0)
    st = pd.DataFrame({"node": [0, 1, 2], "volume_l": 1000.0, "aki": 85.0})
    one_town = pd.DataFrame({"node": [5], "weight": [1.0]})
    many = pd.DataFrame({"node": [0, 1, 2, 3, 4, 5], "weight": 1.0})
    prof = flat_profiles(g)
    run = lambda d, p=None, **kw: co.compute_corridors(g, prof, st, d, toy_requirement, p, **kw)  # noqa: E731
    assert run(one_town).summary["tree_root"] == "destinations"
    assert run(many).summary["tree_root"] == "sources"
    diluted = co.CorridorParams(refill_dilution=0.5)
    assert run(one_town, diluted).summary["tree_root"] == "sources"
    with pytest.raises(co.CorridorError, match="refill_dilution"):
        run(one_town, diluted, tree_root="destinations")
