"""The pipeline's stages, in run order, and the function that runs a config.

Each stage states the columns it requires and adds; the runner (``pipeline.runner``) handles
ordering, reuse of unchanged stages and the manifest. Calculation lives in the pure modules
(atmosphere, terrain, requirement, compliance); file access in ``pipeline.io``.
"""

from __future__ import annotations

import datetime as dt
import functools
import json
import time
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import geopandas as gpd
import numpy as np
import pandas as pd

from pipeline import atmosphere, io, terrain
from pipeline.config import RunConfig
from pipeline.corridor_stage import (
    corridors_stage,
    road_graph_needs,
    road_graph_stage,
    road_graph_used,
    road_profiles_stage,
)
from pipeline.errors import InputFileError
from pipeline.execution import make_executor
from pipeline.ingest import validate_stations
from pipeline.partitions import partition_slices, spatial_partitions
from pipeline.plan_stage import plans_stage
from pipeline.runner import RunResult, Stage, StageContext, run_stages

__all__ = ["STAGES", "run", "require_columns"]


def require_columns(gdf: pd.DataFrame, columns: tuple[str, ...], stage: str) -> None:
    """Stage-boundary check: the upstream artefact carries the columns this stage reads."""
    missing = [c for c in columns if c not in gdf.columns]
    if missing:
        raise RuntimeError(f"stage {stage}: upstream artefact lacks columns {missing}")


# ------------------------------------------------------------------------------- ingest
def _ingest(ctx: StageContext, up: dict[str, dict[str, Any]]) -> dict[str, Any]:
    """Reads the station table; returns ``stations`` (accepted, EPSG:4326) and ``rejected``."""
    cfg = ctx.config.inputs
    table = io.read_station_table(cfg.stations, cfg.stations_layer)
    res = validate_stations(
        table, source=str(cfg.stations), default_crs=cfg.stations_crs, today=ctx.today
    )
    for note in res.notes:
        ctx.log(f"ingest: {note}")
    ctx.counts.update(
        rows_in=int(len(table.frame)),
        rows_accepted=int(len(res.accepted)),
        rows_rejected=int(len(res.rejected)),
    )
    ctx.counts["ingest_notes"] = res.notes
    ctx.counts["station_table"] = {
        "encoding": table.encoding,
        "delimiter": table.delimiter,
        "decimal": table.decimal,
    }
    return {"stations": res.accepted, "rejected": res.rejected}


# ------------------------------------------------------------------------------ terrain
def _terrain(ctx: StageContext, up: dict[str, dict[str, Any]]) -> dict[str, Any]:
    """Adds ``elevation_m``, ``elevation_status``, ``dem_x``, ``dem_y`` (DEM CRS)."""
    st = up["ingest"]["stations"].copy()
    require_columns(st, ("lon", "lat"), "terrain")
    with io.open_dem(ctx.config.inputs.dem) as ds:
        x, y = terrain.transform_points(
            st["lon"].to_numpy(float), st["lat"].to_numpy(float), "EPSG:4326", ds.crs
        )
        # Where would each station fall with lon and lat swapped? (for the reject reason)
        sx, sy = terrain.transform_points(
            st["lat"].to_numpy(float), st["lon"].to_numpy(float), "EPSG:4326", ds.crs
        )
        b = ds.bounds
        with np.errstate(invalid="ignore"):
            swapped_inside = (
                (np.abs(st["lon"].to_numpy(float)) <= 90)
                & (sx >= b.left) & (sx <= b.right) & (sy >= b.bottom) & (sy <= b.top)
            )  # fmt: skip
        dem_info = {
            "crs": ds.crs.to_string(),
            "width": ds.width,
            "height": ds.height,
            "res": list(ds.res),
            "bounds": list(ds.bounds),
            "block_shape": list(ds.block_shapes[0]),
        }
    res = sample_stations(ctx, ctx.config.inputs.dem, x, y)
    st["dem_x"] = x
    st["dem_y"] = y
    st["elevation_m"] = np.round(res.value, 2)
    st["elevation_status"] = res.status
    # A DEM value no terrain has (e.g. -9999 where nodata is not declared) is not an elevation.
    from pipeline.ingest import NUMERIC_RANGES

    z_lo, z_hi = NUMERIC_RANGES["elevation_m"]
    z = st["elevation_m"].to_numpy(float)
    implausible = np.isfinite(z) & ((z < z_lo) | (z > z_hi))
    st.loc[implausible, "elevation_status"] = "implausible_dem_value"
    st.loc[implausible, "elevation_m"] = np.nan
    ctx.counts["dem"] = dem_info
    ctx.counts["dem_blocks_read"] = res.blocks_read
    ctx.counts["elevation_status"] = {
        k: int(v) for k, v in st["elevation_status"].value_counts().items()
    }
    unplaced = ~np.isfinite(st["elevation_m"].to_numpy(float))
    rejected = _as_rejected(st.iloc[0:0], [])
    if ctx.config.terrain.reject_unplaced and unplaced.any():
        why = {
            terrain.STATUS_OUTSIDE: "outside the DEM extent",
            terrain.STATUS_NODATA: "DEM has no data at the station",
            terrain.STATUS_BAD_COORD: "coordinates cannot be placed on the DEM",
        }
        reasons = []
        for i in np.flatnonzero(unplaced):
            s = st["elevation_status"].iloc[i]
            text = why.get(s, s)
            if implausible[i]:
                text = (
                    f"DEM value {z[i]:g} m is not a plausible elevation ({z_lo:g}–{z_hi:g} m; "
                    "nodata not declared in the DEM?)"
                )
            elif s == terrain.STATUS_OUTSIDE and swapped_inside[i]:
                text += "; with lon and lat swapped it would lie inside: lon/lat look swapped"
            reasons.append(f"{text} ({ctx.config.inputs.dem.name})")
        rejected = _as_rejected(
            st[unplaced].drop(columns=["dem_x", "dem_y", "elevation_m"]), reasons
        )
        st = st[~unplaced].reset_index(drop=True)
        ctx.counts["rows_rejected_terrain"] = int(unplaced.sum())
    return {"stations": st, "rejected": rejected}


def _map(ctx: StageContext, fn: Callable, items: list, shared: dict[str, Any]) -> list:
    """``fn(item, **shared)`` over items, by the run's executor (in this process without)."""
    if ctx.executor is None:
        return [fn(item, **shared) for item in items]
    return ctx.executor.map(fn, items, shared=shared)


def _sample_part(item: tuple[np.ndarray, np.ndarray, np.ndarray], *, dem: Path):
    idx, x, y = item
    with io.open_dem(dem) as ds:
        r = terrain.sample_dem(ds, x, y)
    return idx, r.value, r.status, r.blocks_read


def sample_stations(ctx: StageContext, dem: Path, x: np.ndarray, y: np.ndarray):
    """:func:`pipeline.terrain.sample_dem` of the points (DEM CRS) in spatial partitions of
    ``execution.partition_stations`` points along a Morton curve, each opening the DEM where
    it runs. A point's value and status depend on that point and the DEM alone, so the
    result equals the one-piece call to the bit; ``blocks_read`` adds up the partitions'."""
    n = x.size
    parts = spatial_partitions(np.column_stack([x, y]), ctx.config.execution.partition_stations)
    items = [(idx, x[idx], y[idx]) for idx in parts]
    value = np.full(n, np.nan)
    status = np.empty(n, dtype=object)
    blocks = 0
    ctx.counts["station_sampling_partitions"] = len(items)
    for idx, v, stt, b in _map(ctx, _sample_part, items, {"dem": dem}):
        value[idx] = v
        status[idx] = stt
        blocks += b
    return terrain.SampleResult(value, status.astype(str) if n else np.zeros(0, dtype=str), blocks)


def _as_rejected(gdf: gpd.GeoDataFrame, reasons: list[str]) -> gpd.GeoDataFrame:
    """Rows leaving the station table after ingest, as text like ingest's rejected rows."""
    geom = gdf.geometry
    attrs = pd.DataFrame(gdf.drop(columns=[gdf.geometry.name]))
    text = attrs.astype(object).where(attrs.notna(), "").astype(str)
    if "source_row" in attrs.columns:
        text["source_row"] = attrs["source_row"].astype("int64")
    text["reject_reason"] = reasons
    return gpd.GeoDataFrame(text.reset_index(drop=True), geometry=list(geom), crs=gdf.crs)


def _basemap(ctx: StageContext, up: dict[str, dict[str, Any]]) -> dict[str, Any]:
    """The maps' hillshade basemap (a PNG and its bounds), from the DEM alone: a stage of its
    own, so that a new relief size keeps the placed stations, and so that where stages
    overlap it is drawn beside the fleet model instead of holding up the road graph."""
    from pipeline.hillshade import basemap_from_dataset

    with io.open_dem(ctx.config.inputs.dem) as ds:
        bm = basemap_from_dataset(ds, max_pixels=ctx.config.outputs.map_max_basemap_px)
    return {"basemap_png": bm.png_bytes, "basemap_bounds": {"bounds": bm.bounds_latlon}}


# --------------------------------------------------------------------------- atmosphere
def _atmosphere(ctx: StageContext, up: dict[str, dict[str, Any]]) -> dict[str, Any]:
    """Adds ``pressure_kpa``, ``pressure_psi``, ``design_temperature_c``,
    ``relative_humidity_pct``, ``humidity_ratio_g_per_kg`` (US Standard Atmosphere 1976)."""
    st = up["terrain"]["stations"].copy()
    require_columns(st, ("elevation_m",), "atmosphere")
    z = st["elevation_m"].to_numpy(float)
    dd = ctx.config.design_day
    p = atmosphere.standard_pressure_pa(z)
    t = atmosphere.design_temperature_k(z, dd.temperature_offset_k)
    rh = dd.relative_humidity_pct / 100.0
    st["pressure_kpa"] = np.round(atmosphere.pa_to_kpa(p), 3)
    st["pressure_psi"] = np.round(atmosphere.pa_to_psi(p), 3)
    st["design_temperature_c"] = np.round(atmosphere.celsius(t), 2)
    st["relative_humidity_pct"] = np.where(np.isfinite(z), dd.relative_humidity_pct, np.nan)
    st["humidity_ratio_g_per_kg"] = np.round(atmosphere.humidity_ratio_g_per_kg(t, rh, p), 3)
    return {"stations": st}


# -------------------------------------------------------------------------------- fleet
GRADES = (("regular", "regular_aki"), ("midgrade", "midgrade_aki"), ("premium", "premium_aki"))


def _read_fleet_zones(cfg: RunConfig) -> gpd.GeoDataFrame | None:
    if cfg.inputs.fleet_zones is None:
        return None
    zones = io.read_vector(cfg.inputs.fleet_zones, what="fleet zones")
    prefix = cfg.fleet_mix.zone_share_prefix
    cols = [f"{prefix}{n}" for n in cfg.fleet.classes]
    missing = [c for c in cols if c not in zones.columns]
    if len(missing) == len(cols):
        raise InputFileError(
            f"{cfg.inputs.fleet_zones}: no share columns {', '.join(cols)} "
            f"(fleet_mix.zone_share_prefix = {prefix!r})"
        )
    shares = zones[[c for c in cols if c in zones.columns]].astype(float)
    bad = (
        (shares < 0).any(axis=1)
        | ((shares.sum(axis=1) - 1).abs() > 1e-3)
        | shares.isna().any(axis=1)
    )
    if bad.any():
        i = int(np.flatnonzero(bad.to_numpy())[0])
        raise InputFileError(
            f"{cfg.inputs.fleet_zones}: feature {i + 1} has class shares that are negative, "
            f"missing or do not sum to 1"
        )
    for c in missing:
        zones[c] = 0.0
    return zones


def _fleet_part(item, *, params, design) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """The fleet model for one partition of stations (rows ``idx``)."""
    from pipeline import requirement as rq

    idx, mix, z, grades = item
    cond = rq.design_conditions(z, design, params.reference)
    ja = rq.justified_aki(mix, params, cond)
    band = rq.justified_aki_band(mix, params, cond)
    out = {
        "justified_aki": np.asarray(ja.posted_aki, dtype=float),
        "justified_aki_unrounded": np.round(np.asarray(ja.aki, dtype=float), 2),
        "justified_aki_p05": np.round(np.asarray(band.low_aki, dtype=float), 2),
        "justified_aki_p50": np.round(np.asarray(band.median_aki, dtype=float), 2),
        "justified_aki_p95": np.round(np.asarray(band.high_aki, dtype=float), 2),
    }
    for grade, g in grades.items():
        share = rq.share_satisfied(g, mix, params, cond)
        out[f"{grade}_share_satisfied_pct"] = np.round(100 * np.asarray(share, dtype=float), 1)
        be = rq.break_even_elevation(g, mix, params, design=design)
        out[f"{grade}_break_even_elevation_m"] = np.round(
            np.asarray(be.elevation_m, dtype=float), 0
        )
        out[f"{grade}_break_even_status"] = np.where(
            np.isnan(g), "not_sold", np.asarray(be.status)
        ).astype(object)
    return idx, out


def _fleet(ctx: StageContext, up: dict[str, dict[str, Any]]) -> dict[str, Any]:
    """Adds the fleet mix (``fleet_zone``, ``fleet_share_<class>``), ``justified_aki`` (posted,
    rounded up), ``justified_aki_unrounded``, ``justified_aki_p05/p50/p95`` (coefficient
    uncertainty), and per grade sold ``<grade>_share_satisfied_pct``,
    ``<grade>_break_even_elevation_m``, ``<grade>_break_even_status``."""
    from pipeline import requirement as rq

    cfg = ctx.config
    st = up["atmosphere"]["stations"].copy()
    require_columns(st, ("elevation_m", "regular_aki"), "fleet")
    params = cfg.fleet
    names = params.class_names
    n = len(st)
    mix = np.broadcast_to(rq.mix_array(dict(cfg.fleet_mix.shares), params), (n, len(names))).copy()
    zone_name = np.full(n, "default mix", dtype=object)
    zones = _read_fleet_zones(cfg)
    if zones is not None and n:
        zj = gpd.sjoin(st[[st.geometry.name]], zones.to_crs(st.crs), how="left", predicate="within")
        zj = zj[~zj.index.duplicated(keep="first")]
        hit = zj["index_right"].notna().to_numpy()
        prefix = cfg.fleet_mix.zone_share_prefix
        for k, cname in enumerate(names):
            col = zj[f"{prefix}{cname}"].to_numpy(float)
            mix[hit, k] = col[hit]
        zcol = cfg.fleet_mix.zone_name_column
        if zcol in zj.columns:
            zone_name[hit] = zj.loc[hit, zcol].astype(str).to_numpy()
        else:
            zone_name[hit] = [f"zone {int(i) + 1}" for i in zj.loc[hit, "index_right"]]
        mix = rq.mix_array(mix, params)
    st["fleet_zone"] = zone_name
    for k, cname in enumerate(names):
        st[f"fleet_share_{cname}"] = np.round(mix[:, k], 4)
    z = st["elevation_m"].to_numpy(float)
    grades = {grade: st[col].to_numpy(float) for grade, col in GRADES if col in st.columns}
    # stations in spatial partitions; every number below depends on its own station alone
    # (the Monte Carlo band draws its coefficients from a fixed seed, the same in each piece)
    lonlat = np.column_stack([st["lon"].to_numpy(float), st["lat"].to_numpy(float)])
    items = [
        (idx, mix[idx], z[idx], {g: v[idx] for g, v in grades.items()})
        for idx in spatial_partitions(lonlat, cfg.execution.partition_stations)
    ]
    ctx.counts["fleet_partitions"] = len(items)
    cols: dict[str, np.ndarray] = {}
    for idx, part in _map(ctx, _fleet_part, items, {"params": params, "design": cfg.design_day}):
        for name, values in part.items():
            if name not in cols:
                cols[name] = np.empty(n, dtype=values.dtype)
            cols[name][idx] = values
    for name in (
        "justified_aki",
        "justified_aki_unrounded",
        "justified_aki_p05",
        "justified_aki_p50",
        "justified_aki_p95",
    ):
        st[name] = cols[name] if n else np.zeros(0)
    for grade in grades:
        for suffix in ("share_satisfied_pct", "break_even_elevation_m", "break_even_status"):
            st[f"{grade}_{suffix}"] = cols[f"{grade}_{suffix}"] if n else np.zeros(0)
    ctx.counts["justified_aki_counts"] = {
        f"{k:g}": int(v) for k, v in st["justified_aki"].value_counts().sort_index().items()
    }
    return {"stations": st}


# -------------------------------------------------------------------------------- zones
def _zone_part(tiles: list, *, dem: Path, fleet_zones, options: dict[str, Any]) -> list:
    from pipeline.zones import tile_bands

    with io.open_dem(dem) as ds:
        return tile_bands(ds, tiles, fleet_zones=fleet_zones, **options)


def _zones(ctx: StageContext, up: dict[str, dict[str, Any]]) -> dict[str, Any]:
    """Makes ``justified_zones`` (DEM CRS): bands of justified minimum AKI, computed tile by
    tile in partitions of ``execution.partition_tiles`` tiles (each opening the DEM where it
    runs) and dissolved here in tile order."""
    from pipeline.zones import assemble_zones, zone_tiles

    cfg = ctx.config
    if not cfg.zones.enabled:
        return {}
    options = {
        "params": cfg.fleet,
        "design": cfg.design_day,
        "default_mix": dict(cfg.fleet_mix.shares),
        "share_prefix": cfg.fleet_mix.zone_share_prefix,
        "band_edges": tuple(cfg.zones.band_edges_aki),
        "resolution_m": cfg.zones.resolution_m,
    }
    with io.open_dem(cfg.inputs.dem) as ds:
        tiles = zone_tiles(ds, cfg.zones.resolution_m, cfg.zones.tile_cells)
    parts = [tiles[sl] for sl in partition_slices(len(tiles), cfg.execution.partition_tiles)]
    shared = {"dem": cfg.inputs.dem, "fleet_zones": _read_fleet_zones(cfg), "options": options}
    ctx.counts["zone_partitions"] = len(parts)
    results = [r for part in _map(ctx, _zone_part, parts, shared) for r in part]
    ctx.progress("zones", 0.9)
    with io.open_dem(cfg.inputs.dem) as ds:
        gdf, stats = assemble_zones(
            ds,
            results,
            band_edges=options["band_edges"],
            resolution_m=cfg.zones.resolution_m,
            tile_cells=cfg.zones.tile_cells,
        )
    ctx.counts["zones"] = stats
    return {"justified_zones": gdf}


# --------------------------------------------------------------------------- compliance
def load_rule_set(cfg: RunConfig):
    """The configured rule set (rule file or inline table); an example rule when neither."""
    import tomllib

    from pipeline.compliance import rule_set_from_mapping
    from pipeline.errors import ConfigError

    c = cfg.compliance
    if c.rule is not None:
        return rule_set_from_mapping(c.rule)
    path = c.rule_file or (
        Path(__file__).resolve().parent.parent
        / "config"
        / "rules"
        / "example_elevation_threshold.toml"
    )
    try:
        data = tomllib.loads(Path(path).read_text(encoding="utf-8"))
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read the rule file ({exc.strerror or exc})") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: not valid TOML ({exc})") from None
    try:
        return rule_set_from_mapping(data)
    except ConfigError as exc:
        raise ConfigError(f"{path}: {exc}") from None


def _compliance(ctx: StageContext, up: dict[str, dict[str, Any]]) -> dict[str, Any]:
    """Adds ``verdict``, ``verdict_reason``, ``rule_minimum_aki``, ``rule_permits``,
    ``fleet_justifies``, ``field_test_failed`` under the configured rule set."""
    from pipeline.compliance import assess_compliance

    cfg = ctx.config
    st = up["fleet"]["stations"].copy()
    require_columns(st, ("regular_aki", "elevation_m", "justified_aki_unrounded"), "compliance")
    rule = load_rule_set(cfg)
    frame = pd.DataFrame(
        {
            "regular_aki": st["regular_aki"],
            "elevation_m": st["elevation_m"],
            "justified_aki": st["justified_aki_unrounded"],
            "field_test_aki": st["field_test_aki"] if "field_test_aki" in st.columns else np.nan,
        }
    )
    res = assess_compliance(
        frame, rule, target_share=cfg.fleet.target_share, step_aki=cfg.fleet.posting_step_aki
    )
    st["verdict"] = res["verdict"].to_numpy()
    st["verdict_reason"] = res["reason"].to_numpy()
    st["rule_minimum_aki"] = res["rule_minimum_aki"].to_numpy(float)
    for src, dst in (
        ("rule_permits", "rule_permits"),
        ("fleet_justified", "fleet_justifies"),
        ("field_test_failed", "field_test_failed"),
    ):
        st[dst] = res[src].map({True: "yes", False: "no"}).fillna("unknown").to_numpy()
    ctx.counts["rule_set"] = {"name": rule.name, "kind": rule.kind}
    ctx.counts["verdicts"] = {k: int(v) for k, v in st["verdict"].value_counts().items()}
    return {"stations": st}


# ------------------------------------------------------------------------------ publish
#: Column order of the published stations layer (present columns first, in this order).
STATION_COLUMNS_FIRST = (
    "station_id",
    "name",
    "operator",
    "lon",
    "lat",
    "elevation_m",
    "elevation_status",
    "pressure_kpa",
    "pressure_psi",
    "design_temperature_c",
    "relative_humidity_pct",
    "humidity_ratio_g_per_kg",
    "regular_aki",
    "midgrade_aki",
    "premium_aki",
)


def _ordered(gdf: gpd.GeoDataFrame) -> gpd.GeoDataFrame:
    geom = gdf.geometry.name
    first = [c for c in STATION_COLUMNS_FIRST if c in gdf.columns]
    rest = [c for c in gdf.columns if c not in first and c != geom]
    return gdf[first + rest + [geom]]


def _publish(ctx: StageContext, up: dict[str, dict[str, Any]]) -> dict[str, Any]:
    """Writes ``altigrade.gpkg`` (layers ``stations``, ``rejected_stations``,
    ``justified_zones``), ``stations.csv``, ``map.html`` and ``manifest.json`` (all atomic)."""
    last = up[_LAST_STATION_STAGE]["stations"]
    stations = _ordered(last.drop(columns=["dem_x", "dem_y"], errors="ignore"))
    rejected = pd.concat([up["ingest"]["rejected"], up["terrain"]["rejected"]], ignore_index=True)
    rejected = gpd.GeoDataFrame(
        rejected.sort_values("source_row", kind="stable").reset_index(drop=True),
        geometry="geometry",
        crs="EPSG:4326",
    )
    rows_in = ctx.counts.get("rows_in")
    if rows_in is not None and rows_in != len(stations) + len(rejected):
        raise RuntimeError(
            f"row accounting broken: {rows_in} in, {len(stations)} + {len(rejected)} out"
        )
    ctx.counts["stations_out"] = int(len(stations))
    ctx.counts["rejected_out"] = int(len(rejected))
    layers: dict[str, gpd.GeoDataFrame] = {"stations": stations, "rejected_stations": rejected}
    zones = up.get("zones", {}).get("justified_zones")
    if zones is not None:
        layers["justified_zones"] = zones
    corridors = up.get("corridors", {}).get("corridors")
    if corridors is not None:
        layers["corridors"] = corridors
    plans = up.get("plans", {})
    for name in ("inspection_priorities", "inspection_routes", "inspection_bases", "supply_plan"):
        if isinstance(plans.get(name), gpd.GeoDataFrame):
            layers[name] = plans[name]
    out = ctx.out_dir
    crs = ctx.config.outputs.crs

    def table_texts() -> dict[str, str]:
        texts = {
            "stations.csv": io.csv_text(pd.DataFrame(stations.drop(columns=stations.geometry.name)))
        }
        for name in (
            "inspection_priorities",
            "inspection_plan",
            "inspection_unplanned",
            "supply_plan",
            "supply_totals",
            "supply_grade_volumes",
        ):
            table = plans.get(name)
            if table is None:
                continue
            frame = (
                pd.DataFrame(table.drop(columns=table.geometry.name))
                if isinstance(table, gpd.GeoDataFrame)
                else table
            )
            texts[f"{name}.csv"] = io.csv_text(frame)
        return texts

    from pipeline.layer_writer import write_gpkg_layers_in_child
    from pipeline.maps import audience_maps
    from pipeline.report import build_report_html
    from pipeline.webmap import build_map_html

    gpkg = out / "altigrade.gpkg"
    # Build every output first; only then replace the previous ones, so that an input found
    # unusable while drawing (a missing roads file, say) leaves the folder as it was.
    # The GeoPackage is written to a temporary file and renamed over the previous one only
    # once every document is drawn; where stages overlap it is written, and the tables are
    # formatted, while they are drawn.
    with io.atomic_path(gpkg) as gpkg_tmp, ThreadPoolExecutor(1) as writer:
        t0 = time.perf_counter()
        forks = None
        if ctx.executor is not None and ctx.executor.forks_pieces:
            # threads and dask mode on Linux: the documents are drawn by children forked now,
            # before this stage starts its writer thread (no other stage runs beside the last
            # one; in dask mode only the client's own event-loop thread does), one
            # per document; the maps' contents are made here once and inherited, the
            # report's in its child
            specs = audience_maps(ctx, up, stations, zones, rejected)
            # the layers in the output CRS now, before the children share the two cores with
            # the writer: reprojecting the state's 186,000 corridor sections took 0.35 s
            # here and over 1 s beside them, at the end of the stage's longest line
            layers = io.layers_in_crs(layers, crs)
            names = [*specs, "report.html"]
            jobs: list[Callable[[], str]] = [
                functools.partial(build_map_html, spec=spec) for spec in specs.values()
            ]
            jobs.append(lambda: build_report_html(**_report_kwargs(ctx, up, stations, rejected)))
            # and the tables' CSV text in a child of its own, beside the GeoPackage written
            # here: formatted after it on the writer thread, they ended the stage alone on
            # one core (1.1 s of the national subset's 4.6 s publish in dask mode)
            jobs.append(table_texts)
            ctx.part_timings["publish/document_contents"] = time.perf_counter() - t0
            forks = ctx.executor.start_in_forks(jobs)

        def write_layers(in_child: bool) -> float:
            start = time.perf_counter()
            if in_child:  # GDAL's writer holds the interpreter lock: not beside the drawing
                write_gpkg_layers_in_child(gpkg_tmp, layers, crs, final=gpkg)
            else:
                io.write_gpkg_layers_into(gpkg_tmp, layers, crs, final=gpkg)
            return time.perf_counter() - start

        overlap = ctx.executor is not None and ctx.executor.overlaps_stages
        # Where the documents are drawn elsewhere (by forked children on Linux, on the cluster
        # in dask mode elsewhere) this process has the GeoPackage to write meanwhile: it
        # writes it itself (a child's interpreter and imports cost 1.2 s more CPU on the
        # national subset in dask mode, at the same wall time). Where they are drawn on this
        # process's threads (threads mode off Linux) a child writes it: GDAL's writer holds
        # the interpreter lock.
        in_child = overlap and ctx.executor.mode != "dask" and forks is None
        written = writer.submit(write_layers, in_child) if overlap else None
        tables = writer.submit(table_texts) if overlap and forks is None else None
        if forks is None:
            # the documents are independent: render them as separate pieces
            docs = [
                (name, build_map_html, {"spec": spec})
                for name, spec in audience_maps(ctx, up, stations, zones, rejected).items()
            ]
            kwargs = _report_kwargs(ctx, up, stations, rejected)
            docs.append(("report.html", build_report_html, kwargs))
            ctx.part_timings["publish/document_contents"] = time.perf_counter() - t0
            names = [name for name, _, _ in docs]
            rendered = _map(ctx, _render, [(fn, kw) for _, fn, kw in docs], {})
            texts = table_texts() if tables is None else tables.result()
        else:
            try:
                *rendered, texts = forks.results()  # the tables' child is the last job
            finally:
                forks.close()
        texts.update(zip(names, rendered, strict=True))
        ctx.part_timings["publish/documents"] = time.perf_counter() - t0
        geopackage_s = write_layers(False) if written is None else written.result()
        ctx.part_timings["publish/geopackage"] = geopackage_s
    for fname, text in texts.items():
        io.write_text_atomic(out / fname, text)
    outputs = ["altigrade.gpkg", *texts]
    ctx.counts["outputs"] = outputs
    return {"stations": stations, "rejected_stations": rejected}


def _render(item: tuple[Callable[..., str], dict[str, Any]]) -> str:
    fn, kwargs = item
    return fn(**kwargs)


def _report_kwargs(ctx: StageContext, up: dict[str, dict[str, Any]], stations, rejected) -> dict:
    """The arguments of :func:`pipeline.report.build_report_html` for this run."""
    from pipeline.report import decision_sections

    cfg = ctx.config
    manifest = {"config": cfg.model_dump(mode="json"), "inputs_sha256": dict(ctx.inputs_sha256)}
    extra = decision_sections(
        stations=pd.DataFrame(stations.drop(columns=stations.geometry.name)),
        corridors=up.get("corridors", {}).get("corridors"),
        plans=up.get("plans", {}),
    )
    return dict(
        extra_sections=extra,
        title=f"altigrade report — {cfg.name}",
        stations=pd.DataFrame(stations.drop(columns=stations.geometry.name)),
        rejected=pd.DataFrame(rejected.drop(columns=rejected.geometry.name)),
        params=cfg.fleet,
        default_mix=cfg.fleet_mix.shares,
        design=cfg.design_day,
        manifest=manifest,
        generated_note=f"Run date {ctx.today.isoformat()} · altigrade",
    )


_LAST_STATION_STAGE = "plans"


def _inputs(cfg: RunConfig) -> list[Path]:
    return [
        p for p in (cfg.inputs.stations, cfg.inputs.dem, cfg.inputs.fleet_zones) if p is not None
    ]


def _dem_files(cfg: RunConfig) -> list[Path]:
    """The DEM and, for a VRT mosaic, the tiles it names (so a changed tile changes the key)."""
    files = [cfg.inputs.dem]
    if cfg.inputs.dem.suffix.lower() == ".vrt" and cfg.inputs.dem.exists():
        try:
            import rasterio

            with rasterio.open(cfg.inputs.dem) as ds:
                files += [Path(f) for f in ds.files[1:]]
        except Exception:  # a broken VRT is reported by the stage itself
            pass
    return files


def _model_params(c: RunConfig) -> dict[str, Any]:
    """The config slice every stage that evaluates the fleet model depends on."""
    return {
        "fleet": c.fleet.model_dump(mode="json"),
        "mix": c.fleet_mix.model_dump(mode="json"),
        "design_day": c.design_day.model_dump(mode="json"),
    }


def _map_inputs(ctx: StageContext, up: dict[str, dict[str, Any]]) -> dict[str, Any]:
    """Reads what the maps draw from the inputs (the busiest roads, towns, fleet zones:
    :func:`pipeline.maps.read_map_inputs`) and loads the map and report code, ahead of
    ``publish``: where stages overlap this runs while the road graph is still being profiled,
    not at the end of the run."""
    from pipeline import maps, report, webmap  # noqa: F401  (loaded here, off the last stage)

    return maps.read_map_inputs(ctx.config)


STAGES: list[Stage] = [
    Stage(
        "ingest",
        _ingest,
        params=lambda c: c.inputs.model_dump(
            mode="json", include={"stations_layer", "stations_crs"}
        ),
        input_files=lambda c: [c.inputs.stations],
        modules=("pipeline.ingest", "pipeline.io"),
    ),
    Stage(
        "terrain",
        _terrain,
        needs=("ingest",),
        params=lambda c: c.terrain.model_dump(mode="json"),
        input_files=_dem_files,
        modules=("pipeline.terrain", "pipeline.io"),
    ),
    Stage(
        "atmosphere",
        _atmosphere,
        needs=("terrain",),
        params=lambda c: c.design_day.model_dump(mode="json"),
        modules=("pipeline.atmosphere",),
    ),
    Stage(
        "fleet",
        _fleet,
        needs=("atmosphere",),
        params=_model_params,
        input_files=lambda c: [c.inputs.fleet_zones] if c.inputs.fleet_zones else [],
        modules=("pipeline.requirement", "pipeline.octane"),
    ),
    Stage(
        "zones",
        _zones,
        needs=(),
        params=lambda c: {
            "zones": c.zones.model_dump(mode="json"),
            **_model_params(c),
        },
        input_files=lambda c: (
            _dem_files(c) + ([c.inputs.fleet_zones] if c.inputs.fleet_zones else [])
        ),
        modules=("pipeline.zones", "pipeline.requirement"),
    ),
    Stage(
        "compliance",
        _compliance,
        needs=("fleet",),
        params=lambda c: {
            "compliance": c.compliance.model_dump(mode="json"),
            "fleet": c.fleet.model_dump(mode="json", include={"target_share", "posting_step_aki"}),
        },
        input_files=lambda c: [c.compliance.rule_file] if c.compliance.rule_file else [],
        modules=("pipeline.compliance",),
    ),
    Stage(
        "road_graph",
        road_graph_stage,
        needs=road_graph_needs,
        params=lambda c: {
            "used": road_graph_used(c),
            "fallback_grid_cells": None if c.inputs.roads else c.corridors.fallback_grid_cells,
        },
        input_files=lambda c: (
            [c.inputs.roads]
            if c.inputs.roads
            else _dem_files(c) + ([c.inputs.towns] if c.inputs.towns else [])
        ),
        modules=(
            "pipeline.corridor_stage",
            "pipeline.roadgraph",
            "pipeline.terrain_routes",
            "pipeline.io",
        ),
    ),
    Stage(
        "road_profiles",
        road_profiles_stage,
        needs=("road_graph",),
        params=lambda c: {
            "enabled": c.corridors.enabled,
            "climb_grade_threshold_pct": c.corridors.climb_grade_threshold_pct,
            "partition_edges": c.execution.partition_edges,
        },
        input_files=_dem_files,
        modules=("pipeline.corridor_stage", "pipeline.roadgraph", "pipeline.partitions"),
    ),
    Stage(
        "corridors",
        corridors_stage,
        needs=("compliance", "road_graph", "road_profiles"),
        params=lambda c: {
            "corridors": c.corridors.model_dump(mode="json"),
            **_model_params(c),
            "defaults": c.station_defaults.model_dump(mode="json"),
            # how the work is cut fixes the order of the edge sums; the mode does not matter
            "partitions": c.execution.model_dump(mode="json", include={"partition_sources"}),
        },
        input_files=lambda c: [c.inputs.towns] if c.inputs.towns else [],
        modules=(
            "pipeline.corridor_stage",
            "pipeline.partitions",
            "pipeline.roadgraph",
            "pipeline.corridors",
            "pipeline.shortest_paths",
            "pipeline.requirement",
        ),
    ),
    Stage(
        "plans",
        plans_stage,
        needs=("corridors", "road_graph"),
        params=lambda c: {
            "inspection": c.inspection.model_dump(mode="json"),
            "supply": c.supply.model_dump(mode="json"),
            "corridors": c.corridors.model_dump(mode="json"),
            "today_matters": True,
        },
        input_files=lambda c: [c.inputs.inspector_bases] if c.inputs.inspector_bases else [],
        modules=(
            "pipeline.plan_stage",
            "pipeline.inspection",
            "pipeline.supply",
            "pipeline.roadgraph",
        ),
    ),
    # needed only by publish; where stages overlap, drawn once the stations are placed, so
    # that it never holds up the road graph (the state run's longest chain)
    Stage(
        "basemap",
        _basemap,
        params=lambda c: {"basemap_px": c.outputs.map_max_basemap_px},
        input_files=_dem_files,
        modules=("pipeline.hillshade", "pipeline.io"),
        start_after=("terrain",),
    ),
    # read for the maps on every run (not stored: the maps must show the files as they are)
    Stage(
        "map_inputs",
        _map_inputs,
        input_files=lambda c: [
            p for p in (c.inputs.roads, c.inputs.towns, c.inputs.fleet_zones) if p
        ],
        modules=("pipeline.maps", "pipeline.io"),
        cacheable=False,
    ),
]


def _publish_stage() -> Stage:
    needs = tuple(s.name for s in STAGES)
    return Stage("publish", _publish, needs=needs, cacheable=False)


def run(
    config: RunConfig,
    out_dir: str | Path,
    *,
    today: dt.date | None = None,
    progress: Callable[[str, float], None] | None = None,
    log: Callable[[str], None] | None = None,
) -> RunResult:
    """Run every stage of ``config`` and write the outputs into ``out_dir``.

    Returns
    -------
    RunResult with each stage's artefacts (``result.stations``, ``result.rejected``) and the
    manifest, which is also written to ``<out_dir>/manifest.json``.
    """
    out = Path(out_dir)
    _check_out_dir(out)
    _check_inputs_not_in(out, config)
    today = today or run_date()
    with make_executor(config.execution, config.source) as executor:
        executor.warm_up()
        stages = [*STAGES, _publish_stage()]
        result = run_stages(
            stages,
            config,
            out,
            today=today,
            progress=progress,
            log=log,
            executor=executor,
            concurrent_stages=executor.concurrent_stages,
        )
    result.manifest["outputs"] = result.manifest["counts"].pop("outputs", []) + ["manifest.json"]
    io.write_text_atomic(out / "manifest.json", json.dumps(result.manifest, indent=2, default=str))
    return result


def run_date() -> dt.date:
    """The date a run is evaluated at: ``$ALTIGRADE_RUN_DATE`` (YYYY-MM-DD) when set — so that
    reruns, comparisons and tests are reproducible across midnight — else today.

    Raises
    ------
    ConfigError
        The variable is set but is not a date.
    """
    import os

    from pipeline.errors import ConfigError

    text = os.environ.get("ALTIGRADE_RUN_DATE", "").strip()
    if not text:
        return dt.date.today()
    try:
        return dt.date.fromisoformat(text)
    except ValueError:
        raise ConfigError(f"ALTIGRADE_RUN_DATE={text!r} is not a date (YYYY-MM-DD)") from None


def _check_inputs_not_in(out: Path, config: RunConfig) -> None:
    """Outputs have fixed names (stations.csv, map.html, ...): refuse an output folder that
    holds an input file, which the run could overwrite."""
    from pipeline.errors import OutputError

    here = out.resolve()
    paths = [v for v in config.inputs.model_dump().values() if isinstance(v, Path)]
    rule = getattr(getattr(config, "compliance", None), "rule_file", None)
    if rule is not None:
        paths.append(rule)
    for p in paths:
        if p.exists() and p.resolve().parent == here:
            raise OutputError(
                f"{out}: the output folder holds the input {p.name}; the outputs would "
                "overwrite inputs there: choose another --out"
            )


def _check_out_dir(out: Path) -> None:
    from pipeline.errors import OutputError

    if out.exists() and not out.is_dir():
        raise OutputError(f"{out}: the output path exists and is not a folder")
    try:
        out.mkdir(parents=True, exist_ok=True)
        probe = out / ".write-probe"
        probe.write_bytes(b"")
        probe.unlink()
    except OSError as exc:
        raise OutputError(
            f"{out}: cannot write to the output folder ({exc.strerror or exc})"
        ) from None


def validate_inputs(config: RunConfig) -> list[str]:
    """Open and check every input the config names, running nothing. Returns report lines.

    Raises
    ------
    InputFileError
        On the first input that cannot be used as a whole.
    """
    lines = []
    table = io.read_station_table(config.inputs.stations, config.inputs.stations_layer)
    res = validate_stations(
        table,
        source=str(config.inputs.stations),
        default_crs=config.inputs.stations_crs,
        today=run_date(),
    )
    lines.append(
        f"{config.inputs.stations}: {len(table.frame)} rows, {len(res.accepted)} usable, "
        f"{len(res.rejected)} would be rejected"
    )
    for _, r in res.rejected.head(10).iterrows():
        lines.append(f"  row {r['source_row']}: {r['reject_reason']}")
    with io.open_dem(config.inputs.dem) as ds:
        lines.append(
            f"{config.inputs.dem}: {ds.width}×{ds.height} cells, {ds.crs.to_string()}, "
            f"block {ds.block_shapes[0]}"
        )
    for what, path in (
        ("roads", config.inputs.roads),
        ("towns", config.inputs.towns),
        ("fleet zones", config.inputs.fleet_zones),
    ):
        if path is not None:
            gdf = io.read_vector(path, what=what)
            lines.append(f"{path}: {len(gdf)} {what} features, {gdf.crs.to_string()}")
    return lines
