"""Comparing two runs: verdict changes, additive totals, presence."""

from __future__ import annotations

import geopandas as gpd
import pytest
from shapely.geometry import Point

from pipeline.compare import compare_runs


def _run(rows):
    return gpd.GeoDataFrame(rows, geometry=[Point(0, i) for i in range(len(rows))], crs="EPSG:4326")


A = [
    {
        "station_id": "S1",
        "name": "a",
        "verdict": "meets_rule_and_justified",
        "justified_aki": 86.0,
        "incremental_cost_usd_per_month": 0.0,
        "regular_change": "keep",
    },
    {
        "station_id": "S2",
        "name": "b",
        "verdict": "permitted_not_justified",
        "justified_aki": 86.0,
        "incremental_cost_usd_per_month": 100.0,
        "regular_change": "raise",
    },
    {
        "station_id": "S3",
        "name": "c",
        "verdict": "meets_rule_and_justified",
        "justified_aki": 87.0,
        "incremental_cost_usd_per_month": 0.0,
        "regular_change": "keep",
    },
]


def test_identical_runs_change_nothing():
    cmp = compare_runs(_run(A), _run(A))
    assert not cmp.stations["changed"].any()
    assert (cmp.totals["difference"] == 0).all()


def test_verdict_and_cost_changes_are_reported():
    b = [dict(r) for r in A]
    b[1]["verdict"] = "not_permitted"
    b[1]["incremental_cost_usd_per_month"] = 250.0
    cmp = compare_runs(_run(A), _run(b))
    ch = cmp.stations.set_index("station_id")
    assert ch.loc["S2", "changed"] and not ch.loc["S1", "changed"]
    assert "permitted_not_justified → not_permitted" in ch.loc["S2", "change"]
    cost = cmp.totals.set_index("quantity").loc["Incremental cost [USD/month]"]
    # hand-worked: 0 + 100 + 0 = 100 → 0 + 250 + 0 = 250
    assert (cost["run_a"], cost["run_b"], cost["difference"]) == (100.0, 250.0, 150.0)
    assert cmp.verdict_matrix.loc["permitted_not_justified", "not_permitted"] == 1


def test_stations_in_one_run_only():
    cmp = compare_runs(_run(A), _run(A[:2]))
    ch = cmp.stations.set_index("station_id")
    assert ch.loc["S3", "presence"] == "only_a" and ch.loc["S3", "changed"]


@pytest.mark.parametrize("delta", [1e-9, 0.5])
def test_numeric_tolerance(delta):
    b = [dict(r) for r in A]
    b[0]["justified_aki"] += delta
    cmp = compare_runs(_run(A), _run(b))
    assert bool(cmp.stations.set_index("station_id").loc["S1", "changed"]) is (delta > 1e-6)
