"""The plans stage: the regulator's inspection priorities and plan, the distributor's
grade-supply plan. Orchestration only; the calculation is in :mod:`pipeline.inspection` and
:mod:`pipeline.supply`."""

from __future__ import annotations

from typing import Any

import geopandas as gpd
import numpy as np
import pandas as pd

from pipeline import io
from pipeline.config import RunConfig
from pipeline.errors import InputFileError
from pipeline.inspection import inspection_priorities, plan_inspections
from pipeline.supply import supply_plan

__all__ = ["plans_stage", "read_bases"]


def read_bases(path) -> pd.DataFrame:
    """Inspector bases from a CSV (``base_id``, ``name``, ``lon``, ``lat``; EPSG:4326)."""
    table = io.read_station_table(path)
    df = table.frame
    missing = [c for c in ("base_id", "lon", "lat") if c not in df.columns]
    if missing:
        raise InputFileError(
            f"{path}: missing column(s) {', '.join(missing)} (need base_id, name, lon, lat)"
        )
    out = pd.DataFrame(
        {
            "base_id": df["base_id"].astype(str),
            "name": df["name"].astype(str) if "name" in df.columns else df["base_id"],
        }
    )
    for c in ("lon", "lat"):
        out[c] = pd.to_numeric(df[c].str.replace(",", ".", regex=False), errors="coerce")
    bad = (
        out[["lon", "lat"]].isna().any(axis=1) | (out["lon"].abs() > 180) | (out["lat"].abs() > 90)
    )
    if bad.any():
        row = int(table.source_rows[np.flatnonzero(bad.to_numpy())[0]])
        raise InputFileError(f"{path}: row {row}: base position is not a valid lon/lat")
    if out["base_id"].duplicated().any():
        raise InputFileError(f"{path}: duplicate base_id values")
    return out


_DECIMALS = {"score": 2, "leg_km": 2, "cumulative_km": 2, "length_km": 2}


def _tidy(df: pd.DataFrame) -> pd.DataFrame:
    """Round the published numbers to the precision that means something (score points to
    0.1, distances to 10 m, score components to 0.01)."""
    df = df.copy()
    for c in df.columns:
        if c in _DECIMALS:
            df[c] = df[c].astype(float).round(_DECIMALS[c])
        elif c.startswith("score_"):
            df[c] = df[c].astype(float).round(2)
    return df


def _points(df: pd.DataFrame, crs="EPSG:4326") -> gpd.GeoDataFrame:
    return gpd.GeoDataFrame(
        df.reset_index(drop=True), geometry=gpd.points_from_xy(df["lon"], df["lat"]), crs=crs
    )


def plans_stage(ctx, up: dict[str, dict[str, Any]]) -> dict[str, Any]:
    """Adds ``priority_rank``, ``priority_score``, ``priority_reason``, ``planned_day``,
    ``recommended_regular_aki``, ``regular_change``, ``recommendation_driver``,
    ``incremental_cost_usd_per_month``; makes ``inspection_priorities`` (points),
    ``inspection_plan`` (itinerary table), ``inspection_routes`` (lines),
    ``inspection_unplanned``, ``supply_plan`` (points), ``supply_totals`` and
    ``supply_grade_volumes``."""
    cfg: RunConfig = ctx.config
    st = up["corridors"]["stations"].copy()
    out: dict[str, Any] = {}
    if cfg.inspection.enabled:
        pri = _tidy(inspection_priorities(st, cfg.inspection.weights, today=ctx.today))
        by_id = pri.set_index("station_id")
        st["priority_rank"] = st["station_id"].map(by_id["rank"]).to_numpy()
        st["priority_score"] = np.round(st["station_id"].map(by_id["score"]).to_numpy(float), 2)
        st["priority_reason"] = st["station_id"].map(by_id["reason"]).to_numpy()
        out["inspection_priorities"] = _points(pri)
        st["planned_day"] = np.nan
        if cfg.inputs.inspector_bases is not None and len(pri):
            bases = read_bases(cfg.inputs.inspector_bases)
            graph = up["road_graph"]["graph"]
            plan = plan_inspections(graph, pri, bases, cfg.inspection.plan)
            visits = plan.plan[plan.plan["kind"] == "visit"]
            st["planned_day"] = (
                st["station_id"].map(visits.set_index("station_id")["day"]).to_numpy(float)
            )
            out["inspection_plan"] = _tidy(plan.plan.reset_index(drop=True))
            routes = _tidy(plan.routes)
            out["inspection_routes"] = (
                routes if len(routes) else gpd.GeoDataFrame({"day": []}, geometry=[], crs=graph.crs)
            )
            out["inspection_unplanned"] = plan.unplanned.reset_index(drop=True)
            out["inspection_bases"] = _points(bases)
            ctx.counts["inspection_plan"] = {
                k: v for k, v in plan.summary.items() if isinstance(v, int | float | str)
            }
    if cfg.supply.enabled:
        frame = pd.DataFrame(st.drop(columns=st.geometry.name))
        # one default for a blank regular_share, the same the corridors stage used
        share = (
            frame["regular_share"] if "regular_share" in frame else pd.Series(np.nan, frame.index)
        )
        frame["regular_share"] = share.fillna(cfg.station_defaults.regular_share)
        sp = supply_plan(frame, cfg.supply.plan)
        by_id = sp.stations.set_index("station_id")
        st["recommended_regular_aki"] = (
            st["station_id"].map(by_id["recommended_regular_aki"]).to_numpy(float)
        )
        st["regular_change"] = st["station_id"].map(by_id["change"]).to_numpy()
        st["recommendation_driver"] = st["station_id"].map(by_id["driver"]).to_numpy()
        st["incremental_cost_usd_per_month"] = np.round(
            st["station_id"].map(by_id["incremental_cost_usd_per_month"]).to_numpy(float), 2
        )
        plan_pts = sp.stations.merge(st[["station_id", "lon", "lat"]], on="station_id", how="left")
        out["supply_plan"] = _points(plan_pts)
        out["supply_totals"] = sp.totals.reset_index(drop=True)
        out["supply_grade_volumes"] = sp.grade_volumes.reset_index(drop=True)
        tot = sp.totals[sp.totals["grouping"] == "all"]
        if len(tot):
            r = tot.iloc[0]
            ctx.counts["supply_totals"] = {
                "stations_to_raise": int(r["raise"]),
                "incremental_cost_usd_per_month": round(
                    float(r["incremental_cost_usd_per_month"]), 2
                ),
            }
    out["stations"] = st
    return out
