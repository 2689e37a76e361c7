"""Corridors cut into partitions, on subgraphs, and run by each executor (pipeline.corridors,
pipeline.execution).

Outside references: scipy's Dijkstra on the whole graph (the subgraph cut must not change a
distance within the tank range); the straightforward method of finding a station's corridor
grade — re-running the whole calculation with the station's grade raised — against which the
single-pass candidate shares are checked; and the same calculation in one process, against
which the thread pool and a real two-worker Dask cluster on the loopback interface must agree
to the bit. The graphs and fleet requirement are invented test data.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.sparse.csgraph import dijkstra

from pipeline import corridors as co
from pipeline import roadgraph as rg
from pipeline.config import ExecutionConfig
from pipeline.corridor_stage import corridor_required
from pipeline.execution import make_executor

UTM = "EPSG:32608"


def toy_requirement(elev, grade, climb):
    """Invented test fleet (not the project's model): 87.2 AKI at sea level, −1 AKI per
    300 m of elevation, +0.2 AKI per % of uphill grade."""
    return 87.2 - np.asarray(elev) / 300.0 + 0.2 * np.asarray(grade) + 0 * np.asarray(climb)


def grid_graph(seed: int, side: int = 40, spacing_m: float = 2_000.0):
    """A perturbed square grid (side² nodes) with random lengths ≥ the chord."""
    rng = np.random.default_rng(seed)
    ii, jj = np.meshgrid(np.arange(side), np.arange(side), indexing="ij")
    xy = np.c_[jj.ravel() * spacing_m, ii.ravel() * spacing_m] + rng.uniform(
        -300, 300, (side * side, 2)
    )
    idx = np.arange(side * side).reshape(side, side)
    u = np.r_[idx[:, :-1].ravel(), idx[:-1, :].ravel()]
    v = np.r_[idx[:, 1:].ravel(), idx[1:, :].ravel()]
    length = np.hypot(*(xy[u] - xy[v]).T) * rng.uniform(1.0, 1.3, u.size)
    return rg.graph_from_edges(xy, u, v, length, crs=UTM), rng


def profiles_for(graph, rng):
    m = graph.n_edges
    elev = rng.uniform(0, 1_500, m)
    return pd.DataFrame(
        {
            "elevation_min_m": elev - 20,
            "elevation_mean_m": elev,
            "elevation_max_m": elev + 20,
            **{c: elev + k * 5.0 for k, c in enumerate(rg.PROFILE_QUANTILE_COLUMNS)},
            "climb_forward_m": 0.0,
            "climb_reverse_m": 0.0,
            "grade_forward_pct": rng.uniform(0, 8, m),
            "grade_reverse_pct": rng.uniform(0, 8, m),
            "sustained_length_forward_m": 0.0,
            "sustained_climb_forward_m": 0.0,
            "sustained_length_reverse_m": 0.0,
            "sustained_climb_reverse_m": 0.0,
        }
    )


def stations_for(graph, rng, n=60):
    return pd.DataFrame(
        {
            "node": rng.integers(0, graph.n_nodes, n),
            "volume_l": rng.uniform(1e4, 1e5, n),
            "aki": rng.choice([85.0, 85.5, 86.0, 87.0], n),
            "id": [f"s{i}" for i in range(n)],
        }
    )


@pytest.fixture(scope="module")
def case():
    graph, rng = grid_graph(11)
    prof = profiles_for(graph, rng)
    st = stations_for(graph, rng)
    towns = pd.DataFrame(
        {"node": rng.integers(0, graph.n_nodes, 12), "weight": rng.uniform(1e3, 1e5, 12)}
    )
    # a 30 km tank on an ~80 km grid: partitions really are cut to subgraphs
    params = co.CorridorParams(tank_range_km=30.0, decay_km=10.0)
    return graph, prof, st, towns, params


def _run(case, **kw):
    graph, prof, st, towns, params = case
    return co.compute_corridors(graph, prof, st, towns, toy_requirement, params, **kw)


def test_subgraph_cut_keeps_every_distance_within_the_range(case):
    graph, _, st, _, params = case
    net_nodes = np.array([0, 1, 2, 40, 41, 42, 80, 81])  # a corner of the 40 × 40 grid
    r_m = params.tank_range_km * 1000.0
    full = dijkstra(graph.adjacency, indices=net_nodes, limit=r_m)
    # reference: scipy on the whole graph; the nodes within R are reached on the cut graph
    part = co._SourceBatch(
        rows=np.arange(8),
        node=net_nodes,
        volume_l=np.ones(8),
        aki=np.full(8, 85.0),
        exclude=[None] * 8,
    )
    net = co._Network(
        indptr=graph.adjacency.indptr.astype(np.int64),
        indices=graph.adjacency.indices.astype(np.int64),
        length_m=graph.adjacency.data.astype(float),
        node_xy=graph.node_xy,
        node_rank=co._morton_rank(graph.node_xy),
        component=graph.component,
        req_clean=np.zeros((graph.adjacency.nnz, 1)),
        local_aki=np.zeros(graph.adjacency.nnz),
        d_node=np.zeros(0, dtype=np.int64),
        d_weight=np.zeros(0),
        candidate_aki=np.zeros(0),
        params=params,
    )
    adj, nodes, _, _ = co._cut(net, part.node)
    assert nodes.size < graph.n_nodes  # the cut did cut
    local = np.full(graph.n_nodes, -1)
    local[nodes] = np.arange(nodes.size)
    cut = dijkstra(adj, indices=local[net_nodes], limit=r_m)
    rows, cols = np.nonzero(np.isfinite(full))
    assert np.all(local[cols] >= 0)  # every node within R is kept
    np.testing.assert_array_equal(cut[rows, local[cols]], full[rows, cols])
    assert np.isfinite(cut).sum() == rows.size  # and nothing else is reached


ROOTS = ["sources", "destinations"]


@pytest.mark.parametrize("root", ROOTS)
def test_partitioning_leaves_station_results_unchanged_and_edges_to_rounding(case, root):
    one = _run(case, sources_per_partition=10_000, tree_root=root)
    many = _run(case, sources_per_partition=3, tree_root=root)
    assert one.summary["partitions"] == 1 and many.summary["partitions"] > 5
    assert one.summary["tree_root"] == many.summary["tree_root"] == root
    # per station: each source's tree is computed alone, so partitioning changes no bit
    pd.testing.assert_frame_equal(one.stations, many.stations, check_exact=True)
    # per edge: sums over sources in another grouping, equal to rounding
    pd.testing.assert_frame_equal(
        one.edges.reset_index(drop=True), many.edges.reset_index(drop=True), rtol=1e-12
    )
    assert one.summary["sources"] > 20 and len(one.edges) > 100


@pytest.mark.parametrize("root", ROOTS)
def test_candidate_shares_equal_a_rerun_with_the_raised_grade(case, root):
    graph, prof, st, towns, params = case
    cands = np.array([85.5, 86.0, 86.5])
    res = _run(case, candidate_aki=cands, sources_per_partition=7, tree_root=root)
    for c, grade in enumerate(cands):
        trial = st.copy()
        trial["aki"] = np.where(trial["aki"] < grade, grade, trial["aki"])
        rerun = co.compute_corridors(
            graph, prof, trial, towns, toy_requirement, params, tree_root=root
        )
        raised = (st["aki"] < grade).to_numpy() & res.stations["is_source"].to_numpy()
        np.testing.assert_array_equal(
            res.candidate_share_in_deficit[raised, c],
            rerun.stations["fuel_share_in_deficit"].to_numpy()[raised],
        )
        others = ~raised & res.stations["is_source"].to_numpy()
        assert np.isnan(res.candidate_share_in_deficit[others, c]).all()
        assert raised.sum() > 3


def test_corridor_required_picks_the_lowest_sufficient_grade():
    # hand-worked: allowed share 0.10; candidates 85.5, 86, 86.5; standard 87
    aki = np.array([85.0, 85.0, 85.0, 85.5, 86.0, 85.0])
    share_now = np.array([0.05, 0.5, 0.5, 0.5, 0.5, np.nan])
    cand = np.array([85.5, 86.0, 86.5])
    cs = np.array(
        [
            [0.0, 0.0, 0.0],
            [0.3, 0.08, 0.0],  # 86 suffices
            [0.3, 0.2, 0.15],  # nothing below the standard suffices
            [np.nan, 0.1, 0.0],  # 86 (share equal to the allowance counts)
            [np.nan, np.nan, 0.09],  # 86.5
            [np.nan, np.nan, np.nan],  # exports nothing
        ]
    )
    got = corridor_required(
        aki, share_now, cand, cs, standard_aki=87.0, step_aki=0.5, allowed_share=0.10
    )
    np.testing.assert_array_equal(got[:5], [85.0, 86.0, 87.0, 86.0, 86.5])
    assert np.isnan(got[5])


@pytest.mark.parametrize(("mode", "root"), [("threads", r) for r in ROOTS] + [("dask", "auto")])
def test_every_execution_mode_gives_identical_bits(case, mode, root):
    """A real Dask LocalCluster of two worker processes on 127.0.0.1 (or a thread pool)
    against the same partitions run one after another in this process."""
    pytest.importorskip("distributed")
    kw = {"candidate_aki": np.array([86.0]), "sources_per_partition": 9, "tree_root": root}
    ref = _run(case, **kw)
    with make_executor(ExecutionConfig(mode=mode, workers=2)) as ex:
        got = _run(case, executor=ex, **kw)
        assert ex.describe()["workers"] == 2
    pd.testing.assert_frame_equal(ref.stations, got.stations, check_exact=True)
    pd.testing.assert_frame_equal(ref.edges, got.edges, check_exact=True)
    np.testing.assert_array_equal(ref.candidate_share_in_deficit, got.candidate_share_in_deficit)


def test_requirement_function_solves_each_elevation_and_load_once(tmp_path):
    """The stage's fleet requirement on road entries solves each distinct (elevation, load)
    pair once, at elevations taken to the centimetre; the values must be those of the fleet
    model called element by element at those elevations (pipeline.requirement.justified_aki,
    itself checked against its sources in test_requirement.py) and within 1e-4 AKI of it at
    the exact elevations; NaN elevation gives NaN."""
    from pipeline import requirement as rq
    from pipeline.config import parse_config
    from pipeline.corridor_stage import requirement_function

    (tmp_path / "st.csv").write_text("x", encoding="utf-8")
    cfg = parse_config({"inputs": {"stations": "st.csv", "dem": "d.tif"}}, base_dir=tmp_path)
    rng = np.random.default_rng(5)
    n = 4000
    z = np.r_[rng.uniform(0, 3500, n), rng.uniform(0, 3500, 20).repeat(10), np.nan]
    g = np.r_[rng.uniform(0, 10, n), np.tile([0.0, 9.0], 100), 9.0]
    c = np.r_[rng.uniform(0, 800, n), np.full(200, 250.0), 100.0]
    got = requirement_function(cfg)(z, g, c)
    cc = cfg.corridors
    load = np.where(g >= cc.climb_grade_threshold_pct, np.clip(c / cc.full_load_climb_m, 0, 1), 0)
    mix = rq.mix_array(dict(cfg.fleet_mix.shares), cfg.fleet)

    def model(elevation_m):
        cond = rq.design_conditions(elevation_m, cfg.design_day, cfg.fleet.reference)
        load_eff = np.maximum(load, float(cfg.design_day.sustained_load))
        return np.asarray(
            rq.justified_aki(mix, cfg.fleet, cond._replace(sustained_load=load_eff)).aki
        )

    np.testing.assert_array_equal(got, model(np.round(z / 0.01) * 0.01))
    exact = model(z)
    np.testing.assert_allclose(got, exact, rtol=0, atol=1e-4)
    assert not np.array_equal(got[:n], exact[:n])  # the rounding is real
    # as compute_corridors calls it: elevation bins × entries, grades and climbs per entry
    bins = np.stack([z, z + 0.004, z[::-1]])
    got2 = requirement_function(cfg)(bins, g, c)
    assert got2.shape == bins.shape
    for b in range(3):
        np.testing.assert_array_equal(got2[b], requirement_function(cfg)(bins[b], g, c))
    np.testing.assert_array_equal(got2[0], got)
    # elevations too spread for the step table (sorted instead), infinities, a scalar
    wide = np.r_[z[:50], 5e7, -5e7, np.inf, -np.inf]
    gw, cw = np.r_[g[:50], 0, 0, 0, 0], np.r_[c[:50], 0, 0, 0, 0]
    got3 = requirement_function(cfg)(wide, gw, cw)
    np.testing.assert_array_equal(got3[:50], got[:50])
    assert np.isnan(got3[-2:]).all()
    assert float(requirement_function(cfg)(z[0], g[0], c[0])) == got[0]
    # a scalar elevation broadcast against per-entry grades and climbs
    one = requirement_function(cfg)(z[0], g[:5], c[:5])
    assert one.shape == (5,)
    np.testing.assert_array_equal(one, requirement_function(cfg)(np.full(5, z[0]), g[:5], c[:5]))
    assert np.isnan(got[-1]) and np.isfinite(got[:-1]).all()
    assert (got[n : n + 200 : 2] < got[n + 1 : n + 200 : 2]).all()  # the climb load raises it


def test_town_trees_in_two_chunks_change_no_station_bit(case, monkeypatch):
    """A partition's town trees grown in two chunks (side by side on two threads in threads
    mode) against all of them in one chunk: each station's sums bit for bit (its terms are
    added in root order either way), each edge's to rounding, and threads equal to one after
    another to the bit."""
    graph, prof, st, _, _ = case
    # many towns within a long tank range: most stations are summed over many trees, so the
    # order of their terms shows in the bits
    rng = np.random.default_rng(5)
    towns = pd.DataFrame(
        {"node": rng.integers(0, graph.n_nodes, 40), "weight": rng.uniform(1e3, 1e5, 40)}
    )
    params = co.CorridorParams(tank_range_km=90.0, decay_km=40.0)
    kw = {"candidate_aki": np.array([86.0]), "sources_per_partition": 10_000}
    kw["tree_root"] = "destinations"

    def run(**extra):
        return co.compute_corridors(graph, prof, st, towns, toy_requirement, params, **kw, **extra)

    chunked = []
    real = co._tree_chunks
    monkeypatch.setattr(co, "_tree_chunks", lambda n: chunked.append(n) or real(n))
    raw = []  # each partition's unrounded per-source sums
    real_part = co._corridor_partition

    def keep(part, net):
        got = real_part(part, net)
        raw.append({k: got[k].copy() for k in co._TREE_SUM_OUTPUTS})
        return got

    monkeypatch.setattr(co, "_corridor_partition", keep)
    two = run()
    assert chunked and len(real(chunked[0])) == 2  # the partition's trees were split
    with make_executor(ExecutionConfig(mode="threads", workers=2)) as ex:
        threads = run(executor=ex)
    monkeypatch.setattr(co, "_tree_chunks", lambda n: [np.arange(n)])
    one = run()
    assert len(raw) == 3
    for k in co._TREE_SUM_OUTPUTS:  # bit for bit before any rounding
        np.testing.assert_array_equal(raw[0][k], raw[2][k], err_msg=k)
        np.testing.assert_array_equal(raw[1][k], raw[2][k], err_msg=k)
    pd.testing.assert_frame_equal(one.stations, two.stations, check_exact=True)
    np.testing.assert_array_equal(one.candidate_share_in_deficit, two.candidate_share_in_deficit)
    pd.testing.assert_frame_equal(one.edges, two.edges, rtol=1e-12)
    pd.testing.assert_frame_equal(two.stations, threads.stations, check_exact=True)
    pd.testing.assert_frame_equal(two.edges, threads.edges, check_exact=True)
    assert (one.stations["export_risk_l_aki_per_month"] > 0).sum() > 10


def test_threads_mode_solves_the_requirement_beside_the_trees(case):
    """In threads mode the requirement is solved on a thread of its own while the trees
    grow (they need only the lengths): the first tree is grown before the requirement has
    returned, and the sums are the bits of the run that solves it first."""
    import threading

    graph, prof, st, towns, params = case
    kw = {"candidate_aki": np.array([86.0]), "sources_per_partition": 9}
    ref = co.compute_corridors(graph, prof, st, towns, toy_requirement, params, **kw)
    solved = threading.Event()
    events = []

    def slow_requirement(elev, grade, climb):
        events.append(("requirement on", threading.current_thread().name))
        solved.wait(5.0)  # held until a tree has been grown (or 5 s)
        return toy_requirement(elev, grade, climb)

    real = co.bounded_tree

    def watched(*a, **k):
        if not solved.is_set():
            events.append(("tree before requirement", None))
            solved.set()
        return real(*a, **k)

    mp = pytest.MonkeyPatch()
    mp.setattr(co, "bounded_tree", watched)
    try:
        with make_executor(ExecutionConfig(mode="threads", workers=2)) as ex:
            got = co.compute_corridors(
                graph, prof, st, towns, slow_requirement, params, executor=ex, **kw
            )
    finally:
        mp.undo()
    assert events[0][1].startswith("altigrade-requirement")
    assert ("tree before requirement", None) in events
    pd.testing.assert_frame_equal(ref.stations, got.stations, check_exact=True)
    pd.testing.assert_frame_equal(ref.edges, got.edges, check_exact=True)


@pytest.mark.parametrize("mode", ["local", "threads"])
def test_a_requirement_of_the_wrong_shape_is_refused_in_every_mode(case, mode):
    graph, prof, st, towns, params = case
    with make_executor(ExecutionConfig(mode=mode, workers=2)) as ex:
        with pytest.raises(co.CorridorError, match="required_aki returned shape"):
            co.compute_corridors(
                graph, prof, st, towns, lambda e, g, c: np.zeros(3), params, executor=ex
            )
