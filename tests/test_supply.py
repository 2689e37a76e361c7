"""Grade-supply plan (pipeline.supply).

Outside references: a hand-worked cost example (stated in the test; the 1.5–3.5 US cents per
litre per AKI spread is common practice, no source — DOMAIN.md §4); the recommendation rule and
the totals are checked as arithmetic identities over random tables (hypothesis) against plain
numpy / pandas sums computed in the test.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pydantic import ValidationError

from pipeline import supply as sp
from pipeline.errors import AltigradeError

FAST = settings(max_examples=40, deadline=None)


def _table(seed: int, n: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    posted = rng.choice([85.0, 86.0, 87.0, 88.0, np.nan], n, p=[0.3, 0.2, 0.3, 0.1, 0.1])
    just = rng.choice([85.0, 86.0, 87.0, np.nan], n, p=[0.3, 0.3, 0.3, 0.1])
    corr = np.where(rng.random(n) < 0.5, rng.uniform(84, 89, n), np.nan)
    return pd.DataFrame(
        {
            "station_id": [f"ST-{i:04d}" for i in range(n)],
            "name": [f"Station {i}" for i in range(n)],
            "operator": rng.choice(["Alpha Fuels", "Beta Oil", None], n),
            "fleet_zone": rng.choice(["north", "south"], n),
            "regular_aki": posted,
            "justified_aki": just,
            "corridor_required_aki": corr,
            "rule_minimum_aki": rng.choice([85.0, 87.0, np.nan], n),
            "volume_l_per_month": np.where(rng.random(n) < 0.1, np.nan, rng.uniform(0, 4e5, n)),
            "regular_share": np.where(rng.random(n) < 0.3, np.nan, rng.uniform(0.5, 0.9, n)),
        }
    )


def test_hand_worked_cost_example():
    # Hand-worked: 100,000 L/month, 70 % regular → 70,000 L of regular. Posted 85; own fleet
    # needs 86; the descent corridors need 86.3, rounded up to the posting step → 87; rule
    # minimum 85. Recommended 87 = raise by 2 AKI. Cost 70,000 L × 2 AKI × 0.025 USD/(L·AKI)
    # = 3,500 USD/month (2.5 US cents per litre per AKI: common practice, no source).
    df = pd.DataFrame(
        {
            "station_id": ["A"],
            "regular_aki": [85.0],
            "justified_aki": [86.0],
            "corridor_required_aki": [86.3],
            "rule_minimum_aki": [85.0],
            "volume_l_per_month": [100_000.0],
            "regular_share": [0.7],
        }
    )
    row = sp.supply_plan(df).stations.iloc[0]
    assert row["regular_l_per_month"] == pytest.approx(70_000.0)
    assert row["other_grades_l_per_month"] == pytest.approx(30_000.0)
    assert row["corridor_required_posted_aki"] == 87.0
    assert row["recommended_regular_aki"] == 87.0
    assert row["change"] == "raise" and row["driver"] == "descent corridors"
    assert row["raise_aki"] == 2.0
    assert row["incremental_cost_usd_per_month"] == pytest.approx(3_500.0)
    assert row["reason"].startswith("raise 85 → 87 AKI")
    # the low end of the common-practice range, 1.5 cents: 70,000 × 2 × 0.015 = 2,100 USD
    cheap = sp.supply_plan(df, sp.SupplyParams(cost_usd_per_l_per_aki=0.015))
    assert cheap.stations.iloc[0]["incremental_cost_usd_per_month"] == pytest.approx(2_100.0)


@FAST
@given(seed=st.integers(0, 2**31), n=st.integers(0, 30))
def test_recommendation_rule_and_raise_exactly_when_above_posted(seed, n):
    df = _table(seed, n)
    out = sp.supply_plan(df).stations
    posted = df["regular_aki"].to_numpy()
    just = df["justified_aki"].to_numpy()
    corr = np.ceil(df["corridor_required_aki"].to_numpy() - 1e-6)  # posting step 1 AKI
    floor = df["rule_minimum_aki"].to_numpy()
    assessed = ~np.isnan(posted) & ~np.isnan(just)
    expect = np.fmax(np.fmax(just, corr), floor)  # NaN terms ignored
    rec = out["recommended_regular_aki"].to_numpy()
    np.testing.assert_array_equal(rec[assessed], expect[assessed])
    assert np.isnan(rec[~assessed]).all()
    change = out["change"].to_numpy()
    np.testing.assert_array_equal(change == "raise", assessed & (rec > posted))
    np.testing.assert_array_equal(change == "may lower", assessed & (rec < posted))
    np.testing.assert_array_equal(change == "not_assessed", ~assessed)
    # never below the rule or the fleet's need; the 'after' grade never below today's
    with np.errstate(invalid="ignore"):
        assert not (rec[assessed] < just[assessed]).any()
        assert not (rec[assessed] < floor[assessed]).any()
    planned = out["planned_regular_aki"].to_numpy()
    np.testing.assert_array_equal(np.isnan(planned), np.isnan(posted))
    ok = ~np.isnan(posted)
    assert (planned[ok] >= posted[ok]).all()
    cost = out["incremental_cost_usd_per_month"].to_numpy()
    assert (cost[change != "raise"][~np.isnan(cost[change != "raise"])] == 0).all()


@FAST
@given(seed=st.integers(0, 2**31), n=st.integers(1, 30), by=st.sampled_from([None, "fleet_zone"]))
def test_totals_equal_the_sum_of_rows(seed, n, by):
    df = _table(seed, n)
    plan = sp.supply_plan(df, sp.SupplyParams(group_by=by))
    rows, tot = plan.stations, plan.totals
    col = by or "operator"
    groups = df[col].fillna("(none)").astype(str)
    for g, sub in rows.groupby(groups.to_numpy()):
        t = tot[(tot["grouping"] == col) & (tot["group"] == g)].iloc[0]
        assert t["stations"] == len(sub)
        assert t["raise"] == (sub["change"] == "raise").sum()
        assert t["regular_l_per_month"] == pytest.approx(sub["regular_l_per_month"].sum())
        assert t["incremental_cost_usd_per_month"] == pytest.approx(
            np.nansum(sub["incremental_cost_usd_per_month"])
        )
    overall = tot[tot["grouping"] == "all"].iloc[0]
    by_groups = tot[tot["grouping"] == col]
    for c in ("stations", "volume_l_per_month", "incremental_cost_usd_per_month", "keep"):
        assert overall[c] == pytest.approx(by_groups[c].sum())
    assert overall["incremental_cost_usd_per_month"] == pytest.approx(
        np.nansum(rows["incremental_cost_usd_per_month"])
    )
    assert overall[["raise", "keep", "may_lower", "not_assessed"]].sum() == n
    # litres by grade: the same regular litres before and after, only at other grades
    gv = plan.grade_volumes[plan.grade_volumes["grouping"] == "all"]
    reg = gv[gv["grade"] == "regular"]
    assert reg["before_l_per_month"].sum() == pytest.approx(rows["regular_l_per_month"].sum())
    assert reg["after_l_per_month"].sum() == pytest.approx(rows["regular_l_per_month"].sum())
    other = gv[gv["grade"] == "midgrade+premium"].iloc[0]
    assert other["before_l_per_month"] == other["after_l_per_month"]


def test_may_lower_is_information_only():
    df = pd.DataFrame(
        {
            "station_id": ["A", "B"],
            "operator": ["Alpha Fuels", "Alpha Fuels"],
            "regular_aki": [87.0, 87.0],
            "justified_aki": [85.0, 85.0],
            "rule_minimum_aki": [85.0, 87.0],
            "volume_l_per_month": [1e5, 1e5],
        }
    )
    out = sp.supply_plan(df).stations.set_index("station_id")
    assert out.loc["A", "change"] == "may lower"
    assert out.loc["A", "recommended_regular_aki"] == 85.0
    assert out.loc["A", "planned_regular_aki"] == 87.0  # no change planned
    assert out.loc["A", "incremental_cost_usd_per_month"] == 0.0  # no saving counted
    assert "information only" in out.loc["A", "reason"]
    assert out.loc["B", "change"] == "keep" and out.loc["B", "driver"] == "rule minimum"


def test_defaults_for_blank_inputs():
    df = pd.DataFrame(
        {
            "station_id": ["A", "B", "C"],
            "regular_aki": [85.0, 85.0, np.nan],
            "justified_aki": [86.0, np.nan, 86.0],
            "corridor_required_aki": [np.nan, 88.0, np.nan],
            "volume_l_per_month": [1e5, 1e5, 1e5],
            "regular_share": [np.nan, 0.5, 0.5],
        }
    )
    out = sp.supply_plan(df, sp.SupplyParams(default_regular_share=0.6, floor_aki=85.5))
    s = out.stations.set_index("station_id")
    assert s.loc["A", "regular_l_per_month"] == pytest.approx(60_000.0)  # default share
    assert s.loc["A", "recommended_regular_aki"] == 86.0  # NaN corridor ignored
    assert s.loc["B", "change"] == "not_assessed"  # no fleet need: no advice on partial data
    assert s.loc["C", "change"] == "not_assessed"
    assert np.isnan(s.loc["B", "incremental_cost_usd_per_month"])
    assert out.totals.iloc[-1]["not_assessed"] == 2
    assert out.totals.iloc[-1]["group"] == "all stations"


def test_errors_and_parameter_model():
    with pytest.raises(sp.SupplyError, match="justified_aki") as exc:
        sp.supply_plan(pd.DataFrame({"station_id": ["A"], "regular_aki": [85.0]}))
    assert isinstance(exc.value, AltigradeError) and isinstance(exc.value, ValueError)
    df = _table(1, 3)
    with pytest.raises(sp.SupplyError, match="terminal"):
        sp.supply_plan(df, sp.SupplyParams(group_by="terminal"))
    with pytest.raises(ValidationError):
        sp.SupplyParams(cost_cents=2.5)  # extra keys forbidden
    with pytest.raises(ValidationError):
        sp.SupplyParams(cost_usd_per_l_per_aki=-0.01)
    assert sp.SupplyParams().cost_usd_per_l_per_aki == 0.025
