"""Inspection priorities and inspection plans (pipeline.inspection).

Outside references: brute-force enumeration of all visiting orders (itertools.permutations) as
the optimum of small routes; networkx shortest paths on a graph built straight from the input
line vertices (independent of pipeline.roadgraph); the geometric fact that a tour without
crossing edges through points in convex position is optimal (Flood 1956, from memory). The
score's expected values are hand-worked from the transforms documented in the module (its
weights are invented planning choices, not an outside reference).
"""

from __future__ import annotations

import datetime as dt
import itertools

import geopandas as gpd
import networkx as nx
import numpy as np
import pandas as pd
import pytest
import shapely
from hypothesis import given, settings
from hypothesis import strategies as st
from pydantic import ValidationError
from shapely.geometry import LineString

from pipeline import inspection as ins
from pipeline.compliance import VERDICTS
from pipeline.errors import AltigradeError
from pipeline.roadgraph import build_road_graph

UTM = "EPSG:32608"  # demo-region CRS (SCHEMA.md)
X0, Y0 = 300_000.0, 4_400_000.0
TODAY = dt.date(2026, 12, 1)
FAST = settings(max_examples=30, deadline=None)


# ----------------------------------------------------------------------------------------------
# Helpers
# ----------------------------------------------------------------------------------------------


def _matrix(seed: int, n: int, symmetric: bool) -> np.ndarray:
    rng = np.random.default_rng(seed)
    if symmetric:
        xy = rng.uniform(0, 100, (n + 1, 2))
        return np.hypot(*(xy[:, None, :] - xy[None, :, :]).transpose(2, 0, 1))
    d = rng.uniform(1, 100, (n + 1, n + 1))
    np.fill_diagonal(d, 0.0)
    return d


def _brute_force(d: np.ndarray, closed: bool) -> float:
    """Independent reference: the shortest of all visiting orders, summed leg by leg."""
    n = d.shape[0] - 1
    best = np.inf
    for perm in itertools.permutations(range(1, n + 1)):
        seq = (0, *perm, 0) if closed else (0, *perm)
        best = min(best, sum(d[a, b] for a, b in itertools.pairwise(seq)))
    return best


def _station_table(n: int, rng: np.random.Generator) -> pd.DataFrame:
    dates = [
        None if rng.random() < 0.2 else str(TODAY - dt.timedelta(days=int(rng.integers(0, 2000))))
        for _ in range(n)
    ]
    posted = rng.choice([85.0, 86.0, 87.0], n)
    return pd.DataFrame(
        {
            "station_id": [f"ST-{i:04d}" for i in range(n)],
            "name": [f"Station {i}" for i in range(n)],
            "verdict": rng.choice(VERDICTS, n),
            "regular_aki": posted,
            "justified_aki": posted + rng.choice([-1.0, 0.0, 1.0, 2.0, 3.0], n),
            "export_risk_l_aki_per_month": rng.choice([0.0, 1.0], n) * rng.gamma(1, 5000, n),
            "volume_l_per_month": rng.uniform(0, 400_000, n),
            "last_inspection_date": dates,
            "past_test_failures": rng.integers(0, 4, n).astype(float),
            "complaints": rng.integers(0, 7, n).astype(float),
        }
    )


# ----------------------------------------------------------------------------------------------
# Priority score
# ----------------------------------------------------------------------------------------------


def test_hand_worked_score_and_reason():
    # Hand-worked from the module's transforms with the default weights and fixed caps.
    w = ins.PriorityWeights(export_risk_cap_l_aki_per_month=20_000, volume_cap_l_per_month=300_000)
    df = pd.DataFrame(
        {
            "station_id": ["A"],
            "name": ["Test Fuel"],
            "verdict": ["not_permitted"],
            "regular_aki": [85.0],
            "justified_aki": [86.0],
            "export_risk_l_aki_per_month": [12_300.0],
            "volume_l_per_month": [150_000.0],
            "last_inspection_date": ["2023-10-28"],  # 1,130 days before 2026-12-01
            "past_test_failures": [1.0],
            "complaints": [0.0],
        }
    )
    out = ins.inspection_priorities(df, w, today=TODAY)
    row = out.iloc[0]
    assert row["score_verdict"] == pytest.approx(0.9 * 30)  # not_permitted factor 0.9
    assert row["score_deficit"] == pytest.approx(1 / 2 * 20)  # 1 AKI of a 2 AKI cap
    assert row["score_export_risk"] == pytest.approx(12_300 / 20_000 * 15)
    assert row["score_volume"] == pytest.approx(0.5 * 10)
    assert row["score_days_since_inspection"] == pytest.approx(15)  # 1130 d > 1095 d cap
    assert row["score_past_failures"] == pytest.approx(0.5 * 5)
    assert row["score_complaints"] == 0.0
    assert row["score"] == pytest.approx(27 + 10 + 9.225 + 5 + 15 + 2.5)
    assert row["days_since_inspection"] == 1130
    assert row["reason"] == (
        "posted grade not permitted by the rule; not inspected for 1,130 days; "
        "posted 85 vs justified 86 AKI"
    )


@FAST
@given(seed=st.integers(0, 2**31), n=st.integers(1, 25))
def test_components_sum_to_score_within_0_100(seed, n):
    out = ins.inspection_priorities(_station_table(n, np.random.default_rng(seed)), today=TODAY)
    parts = out[[f"score_{c}" for c in ins.SCORE_COMPONENTS]].sum(axis=1)
    np.testing.assert_allclose(parts, out["score"], rtol=0, atol=1e-9)
    assert ((out["score"] >= 0) & (out["score"] <= 100 + 1e-9)).all()
    assert list(out["rank"]) == list(range(1, n + 1))
    assert (np.diff(out["score"].to_numpy()) <= 1e-12).all()


_RAISE = {
    "deficit": lambda df, i: df.loc[i, "justified_aki"] + 1.0,
    "export_risk": lambda df, i: df.loc[i, "export_risk_l_aki_per_month"] * 3 + 2_000.0,
    "volume": lambda df, i: df.loc[i, "volume_l_per_month"] * 2 + 10_000.0,
    "past_failures": lambda df, i: df.loc[i, "past_test_failures"] + 1,
    "complaints": lambda df, i: df.loc[i, "complaints"] + 2,
}
_COLUMN = {
    "deficit": "justified_aki",
    "export_risk": "export_risk_l_aki_per_month",
    "volume": "volume_l_per_month",
    "past_failures": "past_test_failures",
    "complaints": "complaints",
}


@FAST
@given(
    seed=st.integers(0, 2**31),
    n=st.integers(2, 20),
    component=st.sampled_from([*_RAISE, "days_since_inspection", "verdict"]),
    scale=st.sampled_from(["linear", "log"]),
)
def test_raising_one_component_never_lowers_score_or_rank(seed, n, component, scale):
    rng = np.random.default_rng(seed)
    df = _station_table(n, rng)
    w = ins.PriorityWeights(export_risk_scale=scale)
    i = int(rng.integers(0, n))
    before = ins.inspection_priorities(df, w, today=TODAY).set_index("station_id").sort_index()
    df2 = df.copy()
    if component in _RAISE:
        df2.loc[i, _COLUMN[component]] = _RAISE[component](df, i)
    elif component == "days_since_inspection":
        d = df.loc[i, "last_inspection_date"]
        if not pd.isna(d):  # never inspected already earns the configured maximum
            older = dt.date.fromisoformat(d) - dt.timedelta(days=400)
            df2.loc[i, "last_inspection_date"] = str(older)
    else:
        df2.loc[i, "verdict"] = "failed_field_test"  # the largest default factor
    after = ins.inspection_priorities(df2, w, today=TODAY).set_index("station_id").sort_index()
    sid = df.loc[i, "station_id"]
    col = f"score_{component}"
    assert after.loc[sid, col] >= before.loc[sid, col] - 1e-12
    assert after.loc[sid, "score"] >= before.loc[sid, "score"] - 1e-12
    others = after.index != sid
    # Everyone else's contribution of that component can only stay or fall (shared reference).
    assert (after.loc[others, col] <= before.loc[others, col] + 1e-12).all()
    assert after.loc[sid, "rank"] <= before.loc[sid, "rank"]


def test_strict_rise_moves_station_to_the_top():
    df = _station_table(12, np.random.default_rng(3))
    df["verdict"] = "meets_rule_and_justified"
    df["past_test_failures"] = 0.0
    df.loc[5, "verdict"] = "failed_field_test"
    df.loc[5, "past_test_failures"] = 5.0
    df.loc[5, "last_inspection_date"] = None
    out = ins.inspection_priorities(df, today=TODAY)
    assert out.iloc[0]["station_id"] == df.loc[5, "station_id"]


def test_never_inspected_uses_configured_days():
    df = pd.DataFrame(
        {
            "station_id": ["a", "b"],
            "verdict": [None, "meets_rule_and_justified"],
            "last_inspection_date": [None, "2026-11-30"],
        }
    )
    w = ins.PriorityWeights(never_inspected_days=547.5, inspection_interval_cap_days=1095)
    out = ins.inspection_priorities(df, w, today=TODAY).set_index("station_id")
    assert out.loc["a", "score_days_since_inspection"] == pytest.approx(15 * 0.5)
    assert out.loc["b", "score_days_since_inspection"] == pytest.approx(15 * 1 / 1095)
    assert out.loc["a", "verdict"] == "not_assessed"  # blank verdict
    assert "no inspection on record" in out.loc["a", "reason"]
    # absent optional columns contribute nothing and are reported
    assert out["score_complaints"].eq(0).all()
    assert "complaints" in out.attrs["absent_inputs"]


def test_weights_are_relative():
    df = _station_table(15, np.random.default_rng(9))
    a = ins.inspection_priorities(df, today=TODAY)
    doubled = {f"weight_{c}": 2 * ins.PriorityWeights().weight(c) for c in ins.SCORE_COMPONENTS}
    b = ins.inspection_priorities(df, ins.PriorityWeights(**doubled), today=TODAY)
    np.testing.assert_allclose(a["score"], b["score"], atol=1e-9)


def test_quantile_reference_caps_outliers():
    df = pd.DataFrame(
        {
            "station_id": list("abcdefghij"),
            "verdict": "meets_rule_and_justified",
            "volume_l_per_month": [1e5] * 9 + [5e6],
        }
    )
    out = ins.inspection_priorities(df, today=TODAY).set_index("station_id")
    ref = np.quantile([1e5] * 9 + [5e6], 0.95)  # numpy as the quantile reference
    assert out.attrs["volume_ref_l_per_month"] == pytest.approx(ref)
    assert out.loc["j", "score_volume"] == pytest.approx(10.0)
    assert out.loc["a", "score_volume"] == pytest.approx(10.0 * 1e5 / ref)


def test_weight_model_is_strict():
    with pytest.raises(ValidationError):
        ins.PriorityWeights(weight_verdicts=3)  # typo: extra keys are forbidden
    with pytest.raises(ValidationError, match="valid"):
        ins.PriorityWeights(verdict_factors={"mislabelled": 1.0})
    with pytest.raises(ValidationError):
        ins.PriorityWeights(**{f"weight_{c}": 0 for c in ins.SCORE_COMPONENTS})
    w = ins.PriorityWeights(verdict_factors={"not_assessed": 0.7})
    assert w.verdict_factors["failed_field_test"] == 1.0  # others keep their default
    with pytest.raises(ValidationError):
        w.deficit_cap_aki = 3.0  # frozen


def test_unknown_verdict_is_an_error():
    df = pd.DataFrame({"station_id": ["a"], "verdict": ["bad"]})
    with pytest.raises(ins.InspectionError, match="valid") as exc:
        ins.inspection_priorities(df, today=TODAY)
    assert isinstance(exc.value, AltigradeError) and isinstance(exc.value, ValueError)


# ----------------------------------------------------------------------------------------------
# Tours
# ----------------------------------------------------------------------------------------------


@FAST
@given(
    seed=st.integers(0, 2**31),
    n=st.integers(0, 7),
    symmetric=st.booleans(),
    closed=st.booleans(),
)
def test_order_stops_equals_brute_force_optimum(seed, n, symmetric, closed):
    d = _matrix(seed, n, symmetric)
    order, method = ins.order_stops(d, closed)
    assert method == "exact"
    assert sorted(order.tolist()) == list(range(1, n + 1))
    assert ins.tour_length(d, order, closed) == pytest.approx(_brute_force(d, closed), abs=1e-9)


@FAST
@given(
    seed=st.integers(0, 2**31),
    n=st.integers(0, 12),
    symmetric=st.booleans(),
    closed=st.booleans(),
)
def test_two_opt_never_worse_than_nearest_neighbour_and_locally_optimal(seed, n, symmetric, closed):
    d = _matrix(seed, n, symmetric)
    nn = ins.nearest_neighbour_tour(d)
    opt = ins.two_opt(d, nn, closed)
    assert sorted(opt.tolist()) == list(range(1, n + 1))
    length = ins.tour_length(d, opt, closed)
    assert length <= ins.tour_length(d, nn, closed) + 1e-9
    # Local optimality checked by brute force: no single reversal shortens the route.
    for i, j in itertools.combinations(range(n), 2):
        trial = opt.copy()
        trial[i : j + 1] = trial[i : j + 1][::-1]
        assert ins.tour_length(d, trial, closed) >= length - 1e-9


@FAST
@given(seed=st.integers(0, 2**31), n=st.integers(2, 7))
def test_two_opt_is_optimal_on_points_in_convex_position(seed, n):
    # Points on a circle: a route without crossings is the hull order, the optimum
    # (Flood 1956, from memory); 2-opt removes every crossing.
    rng = np.random.default_rng(seed)
    th = rng.uniform(0, 2 * np.pi, n + 1)
    xy = np.c_[np.cos(th), np.sin(th)] * 40.0
    d = np.hypot(*(xy[:, None, :] - xy[None, :, :]).transpose(2, 0, 1))
    start = rng.permutation(np.arange(1, n + 1))
    opt = ins.two_opt(d, start, closed=True)
    assert ins.tour_length(d, opt) == pytest.approx(_brute_force(d, True), abs=1e-9)


def test_large_day_uses_heuristic():
    d = _matrix(4, 12, True)
    order, method = ins.order_stops(d, True, exact_max_stops=10)
    assert method == "nn_2opt" and sorted(order.tolist()) == list(range(1, 13))
    assert ins.tour_length(d, order) <= ins.tour_length(d, ins.nearest_neighbour_tour(d))


# ----------------------------------------------------------------------------------------------
# Road network fixture: a 4 × 4 km grid (1 km blocks), a one-way spur and a separate road
# ----------------------------------------------------------------------------------------------

_GRID_KM = 4


def _grid_lines() -> list[tuple[list[tuple[float, float]], bool]]:
    k = 1000.0
    lines = []
    for r in range(_GRID_KM + 1):
        lines.append(([(X0 + c * k, Y0 + r * k) for c in range(_GRID_KM + 1)], False))
        lines.append(([(X0 + r * k, Y0 + c * k) for c in range(_GRID_KM + 1)], False))
    # one-way shortcuts across two blocks (so distances differ by direction), a one-way spur
    # leaving the grid's north-east corner, and a road in another component
    lines.append(([(X0, Y0), (X0 + k, Y0 + k)], True))
    lines.append(([(X0 + 3 * k, Y0 + 2 * k), (X0 + 2 * k, Y0 + 3 * k)], True))
    lines.append(([(X0 + 4 * k, Y0 + 4 * k), (X0 + 4 * k, Y0 + 6 * k)], True))
    lines.append(([(X0 + 10 * k, Y0), (X0 + 12 * k, Y0)], False))
    return lines


def _graph():
    lines = _grid_lines()
    gdf = gpd.GeoDataFrame(
        {"oneway": [o for _, o in lines]},
        geometry=[LineString(c) for c, _ in lines],
        crs=UTM,
    )
    return build_road_graph(gdf, snap_tolerance_m=0.5)


def _reference_graph() -> nx.DiGraph:
    """networkx graph straight from the line vertices (no pipeline code involved)."""
    g = nx.DiGraph()
    for coords, oneway in _grid_lines():
        for a, b in itertools.pairwise(coords):
            w = float(np.hypot(b[0] - a[0], b[1] - a[1]))
            g.add_edge(a, b, weight=w)
            if not oneway:
                g.add_edge(b, a, weight=w)
    return g


GRAPH = _graph()
REF = _reference_graph()
GRID_POINTS = [(X0 + c * 1000.0, Y0 + r * 1000.0) for r in range(5) for c in range(5)]


def _priorities(xy: list[tuple[float, float]], scores=None) -> pd.DataFrame:
    n = len(xy)
    scores = np.linspace(90, 10, n) if scores is None else np.asarray(scores, float)
    return pd.DataFrame(
        {
            "rank": np.arange(1, n + 1),
            "station_id": [f"S{i:02d}" for i in range(n)],
            "name": [f"Stop {i}" for i in range(n)],
            "score": scores,
            "reason": "test",
            "x": [p[0] for p in xy],
            "y": [p[1] for p in xy],
        }
    )


def _bases(xy: list[tuple[float, float]]) -> pd.DataFrame:
    return pd.DataFrame(
        {
            "base_id": [f"B{i}" for i in range(len(xy))],
            "name": [f"Base {i}" for i in range(len(xy))],
            "x": [p[0] for p in xy],
            "y": [p[1] for p in xy],
        }
    )


def _xy_of(plan_rows: pd.DataFrame, pr: pd.DataFrame, bases: pd.DataFrame):
    pos = {r.station_id: (r.x, r.y) for r in pr.itertuples()}
    bpos = {r.base_id: (r.x, r.y) for r in bases.itertuples()}
    return pos, bpos


def test_leg_distances_match_networkx():
    rng = np.random.default_rng(11)
    pts = [GRID_POINTS[i] for i in rng.choice(len(GRID_POINTS), 9, replace=False)]
    pts[:2] = [GRID_POINTS[6], GRID_POINTS[13]]  # ends of the one-way shortcuts
    pts.append((X0 + 4000.0, Y0 + 6000.0))  # end of the one-way spur: unreachable back
    pr = _priorities(pts)
    bases = _bases([(X0, Y0), (X0 + 4000.0, Y0 + 4000.0)])
    res = ins.plan_inspections(GRAPH, pr, bases, ins.InspectionPlanParams(inspections_per_day=3))
    pos, bpos = _xy_of(res.plan, pr, bases)
    for (day, base), rows in res.plan.groupby(["day", "base_id"]):
        prev = bpos[base]
        for r in rows.itertuples():
            here = bpos[base] if r.kind == "return" else pos[r.station_id]
            ref = nx.shortest_path_length(REF, prev, here, weight="weight")
            assert r.leg_km * 1000 == pytest.approx(ref, abs=1e-6)
            prev = here
        route = res.routes.set_index("day").loc[day]
        assert rows["cumulative_km"].iloc[-1] == pytest.approx(route["length_km"])
        # the day's geometry follows the roads: its length is the routed distance
        assert shapely.length(route.geometry) / 1000 == pytest.approx(route["length_km"])
        if route["length_km"] > 0:
            assert shapely.get_coordinates(route.geometry)[0] == pytest.approx(bpos[base])
    spur = res.unplanned.set_index("station_id").loc["S09"]
    assert spur["status"] == "unreachable"
    assert res.routes.crs == GRAPH.crs


def test_unplaceable_stations_are_listed_with_reasons():
    pts = [
        GRID_POINTS[6],
        (X0 + 11_000.0, Y0),  # on a road with no connection to any base
        (X0 - 16_000.0, Y0 + 2_000.0),  # 16 km from the nearest road
        (np.nan, np.nan),
        GRID_POINTS[7],
    ]
    pr = _priorities(pts, scores=[50, 40, 30, 20, 0])
    res = ins.plan_inspections(GRAPH, pr, _bases([(X0, Y0)]))
    un = res.unplanned.set_index("station_id")
    assert un.loc["S01", "status"] == "unreachable"
    assert un.loc["S02", "status"] == "off_network" and "16.0 km" in un.loc["S02", "reason"]
    assert un.loc["S03", "status"] == "no_position"
    assert un.loc["S04", "status"] == "below_threshold"
    assert res.plan.loc[res.plan["kind"] == "visit", "station_id"].tolist() == ["S00"]
    assert res.summary["unplanned"]["unreachable"] == 1


@settings(max_examples=25, deadline=None)
@given(
    seed=st.integers(0, 2**31),
    n=st.integers(1, 20),
    per_day=st.integers(1, 4),
    days=st.integers(1, 4),
    n_bases=st.integers(1, 3),
    limit_km=st.sampled_from([None, 9.0, 14.0]),
)
def test_budget_respected_and_every_station_once(seed, n, per_day, days, n_bases, limit_km):
    rng = np.random.default_rng(seed)
    pts = [GRID_POINTS[i] for i in rng.integers(0, len(GRID_POINTS), n)]
    bases = _bases([GRID_POINTS[i] for i in rng.choice(len(GRID_POINTS), n_bases, replace=False)])
    pr = _priorities(pts, scores=rng.uniform(1, 100, n))
    pr = pr.sort_values("score", ascending=False).assign(rank=np.arange(1, n + 1))
    params = ins.InspectionPlanParams(inspections_per_day=per_day, days=days, max_daily_km=limit_km)
    res = ins.plan_inspections(GRAPH, pr, bases, params)
    visits = res.plan[res.plan["kind"] == "visit"]
    assert len(visits) <= per_day * days
    assert res.plan["day"].nunique() == len(res.routes) <= days
    assert (visits.groupby("day").size() <= per_day).all()
    assert sorted([*visits["station_id"], *res.unplanned["station_id"]]) == sorted(pr["station_id"])
    assert visits["station_id"].is_unique
    assert set(res.unplanned["status"]) <= set(ins.UNPLANNED_STATUSES)
    if limit_km is not None:
        assert (res.routes["length_km"] <= limit_km + 1e-9).all()
    if limit_km is None:
        # no station is left out of the budget while a slot stays free for its base
        assert len(visits) == min(n, per_day * days) or n_bases > 1
        if n_bases == 1:  # one base: exactly the best-ranked stations are taken
            taken = set(visits["station_id"])
            assert taken == set(pr["station_id"].iloc[: len(taken)])


def test_nearest_base_by_road_and_day_order():
    pts = [GRID_POINTS[0], GRID_POINTS[1], GRID_POINTS[24], GRID_POINTS[23]]
    bases = _bases([(X0, Y0), (X0 + 4000.0, Y0 + 4000.0)])
    res = ins.plan_inspections(
        GRAPH, _priorities(pts), bases, ins.InspectionPlanParams(inspections_per_day=2, days=2)
    )
    v = res.plan[res.plan["kind"] == "visit"].set_index("station_id")
    assert v.loc[["S00", "S01"], "base_id"].tolist() == ["B0", "B0"]
    assert v.loc[["S02", "S03"], "base_id"].tolist() == ["B1", "B1"]
    assert v.loc["S00", "day"] == 1  # the day with the top-ranked station comes first
    np.testing.assert_allclose(res.routes["length_km"], [2.0, 2.0])


def test_station_nodes_override_and_base_off_network():
    pr = _priorities([GRID_POINTS[3], GRID_POINTS[4]]).drop(columns=["x", "y"])
    nodes = [int(np.argmin(np.hypot(*(GRAPH.node_xy - np.array(p)).T))) for p in GRID_POINTS[3:5]]
    res = ins.plan_inspections(GRAPH, pr, _bases([(X0, Y0)]), station_nodes=[nodes[0], -1])
    assert res.unplanned["status"].tolist() == ["off_network"]
    with pytest.raises(ins.InspectionError, match="off the road network"):
        ins.plan_inspections(GRAPH, pr, _bases([(X0 - 50_000.0, Y0)]), station_nodes=nodes)
