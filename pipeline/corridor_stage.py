"""The road stages — road graph, edge profiles — and the corridors stage: flows of
sub-standard fuel and their risk.

Kept apart from ``stages.py`` because it is the largest stage; orchestration only — the
calculation is in :mod:`pipeline.roadgraph`, :mod:`pipeline.corridors` and
:mod:`pipeline.requirement`.
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any

import geopandas as gpd
import numpy as np
import pandas as pd
from numba import njit
from rasterio.enums import Resampling

from pipeline import io, terrain
from pipeline import requirement as rq
from pipeline.config import RunConfig
from pipeline.corridors import compute_corridors, corridor_lines
from pipeline.errors import InputFileError
from pipeline.execution import fewer_full_collections
from pipeline.partitions import spatial_partitions
from pipeline.roadgraph import (
    build_road_graph,
    edge_profiles,
    line_profiles,
    profile_spacing_m,
    snap_points,
)

__all__ = [
    "corridor_candidates",
    "corridor_required",
    "corridors_stage",
    "derived_roads",
    "partitioned_profiles",
    "requirement_function",
    "road_graph_for",
    "road_graph_needs",
    "road_graph_stage",
    "road_graph_used",
    "road_profiles_stage",
]


#: Resolution [m] at which :func:`requirement_function` evaluates elevations.
ELEVATION_STEP_M = 0.01


def requirement_function(cfg: RunConfig):
    """The fleet's requirement on a road, for :func:`pipeline.corridors.compute_corridors`.

    ``f(elevation_m, uphill_grade_pct, sustained_climb_m) -> AKI``: the justified (target-share,
    unrounded) AKI of the default fleet mix on the design day at that elevation, with the
    sustained-load increment scaled by min(1, sustained climb / ``full_load_climb_m``) where the
    grade is at or above ``climb_grade_threshold_pct``.

    Elevations are taken to the nearest centimetre (:data:`ELEVATION_STEP_M`) — far finer than
    any DEM's accuracy, and about 2e-5 AKI at the fleet's steepest response — so that the
    million road entries of a state share a few hundred thousand distinct solves.
    """
    params = cfg.fleet
    mix = rq.mix_array(dict(cfg.fleet_mix.shares), params)
    c = cfg.corridors

    def required_aki(elevation_m, uphill_grade_pct, sustained_climb_m):
        z = np.asarray(elevation_m, dtype=float)
        g = np.asarray(uphill_grade_pct, dtype=float)
        climb = np.asarray(sustained_climb_m, dtype=float)
        # the load on the grade and climb's own (often smaller) shape, then broadcast as a view
        with np.errstate(invalid="ignore"):
            load = np.where(
                g >= c.climb_grade_threshold_pct,
                np.clip(np.nan_to_num(climb) / c.full_load_climb_m, 0.0, 1.0),
                0.0,
            )
        shape = np.broadcast_shapes(z.shape, load.shape)
        zb, lb = np.broadcast_to(z, shape), np.broadcast_to(load, shape)
        base = float(cfg.design_day.sustained_load)
        # the requirement depends on (elevation, load) only: solve each distinct pair once
        # (the two directions of an edge share its elevations; most carry no climb load)
        cols = shape[-1] if shape else 1  # 2-D views for the compiled pass
        inv, z_u, l_u = _distinct_elevation_loads(zb.reshape(-1, cols), lb.reshape(-1, cols), base)
        cond = rq.design_conditions(z_u, cfg.design_day, params.reference)
        cond = cond._replace(sustained_load=l_u)
        solved = np.r_[np.asarray(rq.justified_aki(mix, params, cond).aki, dtype=float), np.nan]
        return solved[inv].reshape(shape)

    return required_aki


def _distinct_elevation_loads(
    z2: np.ndarray, load2: np.ndarray, base: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The distinct (elevation to :data:`ELEVATION_STEP_M`, max(load, base)) pairs of two
    2-D arrays (any strides) and, per element (flattened), the index of its pair — one past
    the last pair for a non-finite elevation. Unloaded elements (most) are numbered through a
    table over their elevation steps, without a sort; loaded ones by ``np.unique``."""
    kz, lf, state, kmin, kmax = _elevation_steps(z2, load2, base)
    n_base = int((state == 1).sum())
    span = kmax - kmin + 1 if n_base else 0
    inv = np.empty(kz.size, dtype=np.int64)
    if span > 4 * kz.size + 1_000_000:  # elevations too spread for a table: sort them
        state[state == 1] = 2
        keys = np.zeros(0, dtype=np.int64)
    else:
        keys = _number_by_table(kz, state, kmin, span, inv)
    loaded = np.flatnonzero(state == 2)
    pair = np.empty(loaded.size, dtype=np.complex128)
    pair.real = kz[loaded] * ELEVATION_STEP_M
    pair.imag = lf[loaded]
    uniq, inv2 = np.unique(pair, return_inverse=True)
    inv[loaded] = keys.size + inv2
    n_u = keys.size + uniq.size
    inv[state == 0] = n_u
    z_u = np.r_[keys * ELEVATION_STEP_M, uniq.real]
    l_u = np.r_[np.full(keys.size, base), uniq.imag]
    return inv, z_u, l_u


@njit(cache=True, nogil=True)
def _elevation_steps(z2, load2, base):
    """Per element: elevation step rint(z / step), max(load, base), and state 0 (non-finite
    elevation), 1 (load = base) or 2; and the range of steps of state 1."""
    rows, cols = z2.shape
    n = rows * cols
    kz = np.zeros(n, dtype=np.int64)
    lf = np.empty(n, dtype=np.float64)
    state = np.zeros(n, dtype=np.int8)
    kmin = np.iinfo(np.int64).max
    kmax = np.iinfo(np.int64).min
    i = 0
    for r in range(rows):
        for col in range(cols):
            q = np.rint(z2[r, col] / ELEVATION_STEP_M)
            ld = max(load2[r, col], base)
            lf[i] = ld
            if np.isfinite(q) and abs(q) < 1e15:
                k = np.int64(q)
                kz[i] = k
                if ld == base:
                    state[i] = 1
                    kmin = min(kmin, k)
                    kmax = max(kmax, k)
                else:
                    state[i] = 2
            i += 1
    return kz, lf, state, kmin, kmax


@njit(cache=True, nogil=True)
def _number_by_table(kz, state, kmin, span, inv):
    """Number the distinct steps of state-1 elements in first-seen order (into ``inv``);
    returns the steps in number order."""
    table = np.full(span, -1, dtype=np.int64)
    nu = 0
    for i in range(kz.size):
        if state[i] == 1:
            t = kz[i] - kmin
            if table[t] < 0:
                table[t] = nu
                nu += 1
            inv[i] = table[t]
    keys = np.empty(nu, dtype=np.int64)
    for t in range(span):
        if table[t] >= 0:
            keys[table[t]] = t + kmin
    return keys


def derived_roads(ds, endpoints_xy: np.ndarray, grid_cells: int) -> gpd.GeoDataFrame:
    """Fallback without a road layer: least-cost routes over the DEM between the endpoints."""
    from pipeline.terrain_routes import build_terrain_routes

    f = max(1, int(np.ceil(max(ds.width, ds.height) / grid_cells)))
    shape = (int(np.ceil(ds.height / f)), int(np.ceil(ds.width / f)))
    elev = ds.read(1, out_shape=shape, resampling=Resampling.average, masked=True)
    z = np.asarray(elev.filled(np.nan), dtype=float)
    transform = ds.transform * ds.transform.scale(ds.width / shape[1], ds.height / shape[0])
    ok = np.all(np.isfinite(endpoints_xy), axis=1)
    pts = [tuple(p) for p in endpoints_xy[ok]]
    if len(pts) < 2:
        return gpd.GeoDataFrame({"road_class": []}, geometry=[], crs=ds.crs)
    net = build_terrain_routes(z, transform, pts, max_grid_cells=None)
    geoms = [s.geometry for s in net.segments]
    return gpd.GeoDataFrame({"road_class": ["derived"] * len(geoms)}, geometry=geoms, crs=ds.crs)


def road_graph_for(
    cfg: RunConfig, ds, stations: gpd.GeoDataFrame | None, towns: gpd.GeoDataFrame | None
):
    """The routable road graph of a run: the road layer, or roads derived from the DEM between
    stations (required then) and towns when there is none. Returns (graph, description of
    the source)."""
    if cfg.inputs.roads is not None:
        roads = io.read_vector(cfg.inputs.roads, what="roads", arrow=True)
        source = "road layer"
    else:
        sx, sy = terrain.transform_points(stations["lon"], stations["lat"], "EPSG:4326", ds.crs)
        pts = [np.column_stack([sx, sy])]
        if towns is not None:
            tt = towns.to_crs(ds.crs)
            pts.append(np.column_stack([tt.geometry.x, tt.geometry.y]))
        roads = derived_roads(ds, np.vstack(pts), cfg.corridors.fallback_grid_cells)
        source = "derived from the DEM (no road layer)"
    return build_road_graph(roads), source


def _profile_part(
    edges: np.ndarray,
    *,
    geometry,
    length_m,
    crs,
    dem: Path,
    spacing_m: float,
    climb_grade_threshold_pct: float,
) -> pd.DataFrame:
    """One partition of :func:`partitioned_profiles`: opens the DEM where it runs."""
    with io.open_dem(dem) as ds:
        return line_profiles(
            geometry[edges],
            length_m[edges],
            crs,
            ds,
            spacing_m=spacing_m,
            climb_grade_threshold_pct=climb_grade_threshold_pct,
        )


def partitioned_profiles(
    graph,
    dem: Path,
    *,
    spacing_m: float,
    climb_grade_threshold_pct: float,
    edges_per_partition: int,
    executor=None,
) -> pd.DataFrame:
    """:func:`pipeline.roadgraph.edge_profiles` of every edge, computed in spatial partitions.

    Edges are ordered along a Morton curve of the midpoints of their end nodes (so a
    partition touches few DEM blocks) and cut into partitions of ``edges_per_partition``; each
    partition opens the DEM itself and profiles its edges with
    :func:`pipeline.roadgraph.line_profiles`. A line's profile depends on that line and the DEM
    alone, so the table equals the one-piece calculation to the bit, in every execution
    mode."""
    m = graph.n_edges
    if m == 0:
        with io.open_dem(dem) as ds:
            return edge_profiles(
                graph, ds, spacing_m=spacing_m, climb_grade_threshold_pct=climb_grade_threshold_pct
            )
    # edges ordered by the middle of their end nodes (only the partitioning depends on it)
    node_xy = np.asarray(graph.node_xy, dtype=float)
    mid = 0.5 * (node_xy[np.asarray(graph.u)] + node_xy[np.asarray(graph.v)])
    parts = spatial_partitions(mid, edges_per_partition)
    shared = {
        "geometry": graph.geometry,
        "length_m": np.asarray(graph.length_m, dtype=float),
        "crs": graph.crs.to_wkt(),
        "dem": Path(dem),
        "spacing_m": float(spacing_m),
        "climb_grade_threshold_pct": float(climb_grade_threshold_pct),
    }
    if executor is None:
        results = [_profile_part(p, **shared) for p in parts]
    else:
        results = executor.map(_profile_part, parts, shared=shared)
    out = pd.concat(
        [r.set_axis(p, axis=0) for p, r in zip(parts, results, strict=True)]
    ).sort_index()
    out.index = pd.RangeIndex(m, name="edge")
    out.attrs.update(results[0].attrs)
    out.attrs["blocks_read"] = int(sum(r.attrs.get("blocks_read", 0) for r in results))
    out.attrs["partitions"] = len(parts)
    return out


def _towns(cfg: RunConfig) -> gpd.GeoDataFrame | None:
    return io.read_vector(cfg.inputs.towns, what="towns") if cfg.inputs.towns else None


def road_graph_needs(cfg: RunConfig) -> tuple[str, ...]:
    """Stages the road graph needs: none with a road layer (it is read from the file alone, so
    it can start with the run); the stations placed on the DEM (terrain) when roads are
    derived between them."""
    return () if cfg.inputs.roads is not None else ("terrain",)


def road_graph_used(cfg: RunConfig) -> bool:
    """Whether a run routes on roads: for the corridors, or for the inspectors' itineraries."""
    plans = cfg.inspection.enabled and cfg.inputs.inspector_bases is not None
    return cfg.corridors.enabled or plans


def road_graph_stage(ctx, up: dict[str, dict[str, Any]]) -> dict[str, Any]:
    """Makes the routable ``graph`` (:class:`pipeline.roadgraph.RoadGraph`): from the road
    layer, or derived over the DEM between the stations placed on it and the towns."""
    cfg: RunConfig = ctx.config
    if not road_graph_used(cfg):
        return {"graph": None}
    derived = cfg.inputs.roads is None
    stations = up["terrain"]["stations"] if derived else None
    towns = _towns(cfg) if derived else None
    # arrays of half a million geometries: no full garbage collection after each one
    with io.open_dem(cfg.inputs.dem) as ds, fewer_full_collections():
        graph, source = road_graph_for(cfg, ds, stations, towns)
    ctx.counts["road_graph"] = {
        k: v for k, v in graph.stats.items() if not isinstance(v, dict | list)
    }
    ctx.counts["road_source"] = source
    return {"graph": graph}


def road_profiles_stage(ctx, up: dict[str, dict[str, Any]]) -> dict[str, Any]:
    """Makes ``profiles``: every edge's elevation profile over the DEM
    (:func:`partitioned_profiles`, one row per edge in edge order)."""
    cfg: RunConfig = ctx.config
    graph = up["road_graph"]["graph"]
    if graph is None or not cfg.corridors.enabled:
        return {"profiles": None}
    with io.open_dem(cfg.inputs.dem) as ds:
        spacing_m = profile_spacing_m(graph, ds)
    profiles = partitioned_profiles(
        graph,
        cfg.inputs.dem,
        spacing_m=spacing_m,
        climb_grade_threshold_pct=cfg.corridors.climb_grade_threshold_pct,
        edges_per_partition=cfg.execution.partition_edges,
        executor=ctx.executor,
    )
    ctx.counts["edge_profile_partitions"] = int(profiles.attrs.get("partitions", 1))
    return {"profiles": profiles.reset_index(drop=True)}


def corridors_stage(ctx, up: dict[str, dict[str, Any]]) -> dict[str, Any]:
    """Adds ``export_risk_l_aki_per_month``, ``fuel_share_in_deficit``, ``corridor_status``,
    ``corridor_required_aki``, ``road_snap_m``; makes the ``corridors`` lines (graph CRS).
    Uses the ``road_graph`` and ``road_profiles`` stages."""
    cfg: RunConfig = ctx.config
    st = up["compliance"]["stations"].copy()
    cc = cfg.corridors
    if not cc.enabled or len(st) == 0:
        return {"stations": st}
    towns = _towns(cfg)
    if cc.destinations == "towns" and towns is None:
        raise InputFileError("corridors.destinations = 'towns' needs inputs.towns")
    if towns is not None and cc.destinations == "towns" and "population" not in towns.columns:
        raise InputFileError(f"{cfg.inputs.towns}: the towns layer needs a 'population' column")
    t0 = time.perf_counter()
    graph = up["road_graph"]["graph"]
    profiles = up["road_profiles"]["profiles"]
    timings = {}
    sx, sy = terrain.transform_points(st["lon"], st["lat"], "EPSG:4326", graph.crs)
    node, dist, snapped = snap_points(graph, np.column_stack([sx, sy]), cc.snap_distance_m)
    vol = (
        st["volume_l_per_month"].to_numpy(float)
        if "volume_l_per_month" in st
        else np.zeros(len(st))
    )
    share = (
        st["regular_share"].to_numpy(float) if "regular_share" in st else np.full(len(st), np.nan)
    )
    share = np.where(np.isfinite(share), share, cfg.station_defaults.regular_share)
    sources = pd.DataFrame(
        {
            "node": np.where(snapped, node, -1),
            "volume_l": np.nan_to_num(vol) * share,
            "aki": st["regular_aki"].to_numpy(float),
            "id": st["station_id"].astype(str).to_numpy(),
        }
    )
    dests = None
    if cc.destinations == "towns":
        tt = towns.to_crs(graph.crs)
        tn, _, tsnap = snap_points(
            graph, np.column_stack([tt.geometry.x, tt.geometry.y]), cc.snap_distance_m
        )
        dests = pd.DataFrame({"node": tn[tsnap], "weight": tt["population"].to_numpy(float)[tsnap]})
        ctx.counts["towns_snapped"] = int(tsnap.sum())
        ctx.counts["towns_not_snapped"] = int((~tsnap).sum())
    req = requirement_function(cfg)
    candidates = corridor_candidates(cfg)
    res = compute_corridors(
        graph,
        profiles,
        sources,
        dests,
        req,
        cc.model,
        candidate_aki=candidates,
        sources_per_partition=cfg.execution.partition_sources,
        executor=ctx.executor,
    )
    timings["flows"] = res.summary["total_s"]
    timings["shortest_path_trees"] = res.summary["dijkstra_s"]
    ctx.progress("corridors", 0.7)
    srow = res.stations.reset_index(drop=True)
    st["road_snap_m"] = np.round(dist, 1)
    st["export_risk_l_aki_per_month"] = np.round(
        srow["export_risk_l_aki_per_month"].to_numpy(float), 1
    )
    st["fuel_share_in_deficit"] = np.round(srow["fuel_share_in_deficit"].to_numpy(float), 4)
    status = srow["status"].astype(str).to_numpy()
    st["corridor_status"] = np.where(~snapped, "not_on_road_network", status)
    sending = srow["status"].astype(str).to_numpy() == "source"
    share_now = np.where(sending, srow["fuel_share_in_deficit"].to_numpy(float), np.nan)
    st["corridor_required_aki"] = corridor_required(
        sources["aki"].to_numpy(float),
        share_now,
        candidates,
        res.candidate_share_in_deficit,
        standard_aki=cc.model.sea_level_standard_aki,
        step_aki=cfg.fleet.posting_step_aki,
        allowed_share=1.0 - cfg.fleet.target_share,
    )
    ctx.counts["corridor_partitions"] = res.summary["partitions"]
    timings["total"] = time.perf_counter() - t0
    ctx.part_timings.update({f"corridors/{k}": v for k, v in timings.items()})
    ctx.log("corridors: " + ", ".join(f"{k} {v:.2f} s" for k, v in timings.items()))
    lines = corridor_lines(graph, res)
    ctx.counts["corridor_edges"] = int(len(lines))
    ctx.counts["stations_not_on_roads"] = int((~snapped).sum())
    return {"stations": st, "corridors": lines}


def corridor_candidates(cfg: RunConfig) -> np.ndarray:
    """Posting-grid grades [AKI] below the sea-level standard that a station might move its
    regular to: every step from the lowest grade ever posted (80) up to the standard."""
    std = cfg.corridors.model.sea_level_standard_aki
    step = cfg.fleet.posting_step_aki
    lo = np.floor(_LOWEST_POSTED_AKI / step) * step
    grid = np.round(np.arange(lo, std, step), 6)
    return grid[grid < std - 1e-9]


#: The lowest regular grade the candidate search starts from [AKI] (below any grade sold).
_LOWEST_POSTED_AKI = 80.0


def corridor_required(
    aki: np.ndarray,
    share_now: np.ndarray,
    candidates: np.ndarray,
    candidate_share: np.ndarray,
    *,
    standard_aki: float,
    step_aki: float,
    allowed_share: float,
) -> np.ndarray:
    """Lowest posting-grid AKI whose exported fuel stays out of deficit on at least the target
    share of its driving (volume × distance), capped at the sea-level standard.

    Parameters
    ----------
    aki : ndarray (n,)
        Regular AKI posted today [AKI].
    share_now : ndarray (n,)
        ``fuel_share_in_deficit`` at today's grade; NaN where the station exports nothing.
    candidates : ndarray (k,)
        Candidate grades [AKI], ascending, below the standard.
    candidate_share : ndarray (n, k)
        ``fuel_share_in_deficit`` had the station sold each candidate
        (:attr:`pipeline.corridors.CorridorResult.candidate_share_in_deficit`).
    standard_aki, step_aki, allowed_share : float
        Sea-level standard [AKI], posting step [AKI], and 1 − the fleet's target share.

    Returns
    -------
    ndarray (n,) [AKI]: today's grade rounded up to the step where it already suffices; else
    the lowest candidate above today's grade that does; else the standard. NaN where the
    station exports nothing.
    """
    aki = np.asarray(aki, dtype=float)
    share_now = np.asarray(share_now, dtype=float)
    out = np.full(aki.size, np.nan)
    exporting = np.isfinite(share_now)
    out[exporting] = standard_aki
    ok_now = exporting & (share_now <= allowed_share)
    out[ok_now] = np.ceil(aki[ok_now] / step_aki - 1e-9) * step_aki
    done = ~exporting | ok_now
    for c, cand in enumerate(candidates):
        with np.errstate(invalid="ignore"):
            clear = ~done & (cand > aki + 1e-9) & (candidate_share[:, c] <= allowed_share)
        out[clear] = cand
        done |= clear
    return out
