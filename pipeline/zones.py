"""Justified-AKI zones over the DEM: a coarse grid computed tile by tile, classified into bands
and vectorised into polygons.

Takes an open dataset (never a file name); memory is bounded by the tile size.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence

import geopandas as gpd
import numpy as np
import rasterio
import shapely
from rasterio.enums import Resampling
from rasterio.features import rasterize, shapes
from rasterio.transform import Affine
from rasterio.windows import Window

from pipeline.requirement import (
    DesignDay,
    FleetModelParams,
    band_labels,
    classify_bands,
    justified_aki_grid,
    mix_array,
)

__all__ = [
    "assemble_zones",
    "justified_zones",
    "tile_bands",
    "zone_grid_factor",
    "zone_tiles",
]

_M_PER_DEG = 111_320.0  # length of one degree of latitude, rounded [m] (from memory)


def zone_grid_factor(ds: rasterio.io.DatasetReader, resolution_m: float) -> int:
    """How many DEM cells per side make one zone-grid cell of about ``resolution_m`` metres."""
    rx = abs(ds.transform.a)
    if ds.crs is not None and ds.crs.is_geographic:
        lat = (ds.bounds.top + ds.bounds.bottom) / 2
        rx = rx * _M_PER_DEG * np.cos(np.radians(lat))
    return max(1, int(round(resolution_m / rx)))


def zone_tiles(ds: rasterio.io.DatasetReader, resolution_m: float, tile_cells: int):
    """The zone grid's tiles: ``(row0, col0, rows, cols)`` in zone-grid cells, row-major."""
    factor = zone_grid_factor(ds, resolution_m)
    gw = int(np.ceil(ds.width / factor))
    gh = int(np.ceil(ds.height / factor))
    return [
        (r0, c0, min(tile_cells, gh - r0), min(tile_cells, gw - c0))
        for r0 in range(0, gh, tile_cells)
        for c0 in range(0, gw, tile_cells)
    ]


def tile_bands(
    ds: rasterio.io.DatasetReader,
    tiles: Sequence[tuple[int, int, int, int]],
    *,
    params: FleetModelParams,
    design: DesignDay,
    default_mix: Mapping[str, float],
    fleet_zones: gpd.GeoDataFrame | None,
    share_prefix: str,
    band_edges: Sequence[float],
    resolution_m: float,
) -> list[tuple[list[tuple[int, object]], np.ndarray, np.ndarray]]:
    """Band polygons of some zone-grid tiles (:func:`zone_tiles`): per tile, the pieces
    ``(band index, polygon)`` in the order GDAL traces them, and the smallest and largest
    justified AKI of each band in the tile (±inf where absent). Each tile depends on its own
    DEM window alone, so tiles may be computed in any partition."""
    factor = zone_grid_factor(ds, resolution_m)
    gt = ds.transform * Affine.scale(factor, factor)
    names = params.class_names
    base = mix_array(dict(default_mix), params)
    zones_dem = None
    if fleet_zones is not None and len(fleet_zones):
        zones_dem = fleet_zones.to_crs(ds.crs) if fleet_zones.crs != ds.crs else fleet_zones
        zshares = np.stack(
            [
                zones_dem[f"{share_prefix}{n}"].to_numpy(float)
                if f"{share_prefix}{n}" in zones_dem.columns
                else np.zeros(len(zones_dem))
                for n in names
            ],
            axis=-1,
        )
        zshares = mix_array(zshares, params)
    n_bands = len(band_labels(band_edges))
    out = []
    for r0, c0, th, tw in tiles:
        win = Window(
            c0 * factor,
            r0 * factor,
            min(tw * factor, ds.width - c0 * factor),
            min(th * factor, ds.height - r0 * factor),
        )
        elev = ds.read(
            1, window=win, out_shape=(th, tw), resampling=Resampling.average, masked=True
        )
        z = np.asarray(elev.filled(np.nan), dtype=float)
        tt = gt * Affine.translation(c0, r0)
        mix = np.broadcast_to(base, z.shape + base.shape[-1:]).copy()
        if zones_dem is not None:
            idx = rasterize(
                ((g, i + 1) for i, g in enumerate(zones_dem.geometry) if g is not None),
                out_shape=z.shape,
                transform=tt,
                fill=0,
                dtype="int32",
            )
            inside = idx > 0
            mix[inside] = zshares[idx[inside] - 1]
        vals = justified_aki_grid(z, mix, params, design=design)
        codes = classify_bands(vals, band_edges).astype("int16")
        pieces = [
            (int(code), shapely.geometry.shape(geom))
            for geom, code in shapes(codes, mask=codes >= 0, transform=tt)
        ]
        vmin = np.full(n_bands, np.inf)
        vmax = np.full(n_bands, -np.inf)
        for k in range(n_bands):
            sel = codes == k
            if sel.any():
                vmin[k] = float(np.nanmin(vals[sel]))
                vmax[k] = float(np.nanmax(vals[sel]))
        out.append((pieces, vmin, vmax))
    return out


def assemble_zones(
    ds: rasterio.io.DatasetReader,
    tile_results: Sequence[tuple[list[tuple[int, object]], np.ndarray, np.ndarray]],
    *,
    band_edges: Sequence[float],
    resolution_m: float,
    tile_cells: int,
) -> tuple[gpd.GeoDataFrame, dict]:
    """Dissolve the tiles' band pieces (in tile order) into one polygon per band."""
    labels = band_labels(band_edges)
    pieces: dict[int, list] = {i: [] for i in range(len(labels))}
    vmin = np.full(len(labels), np.inf)
    vmax = np.full(len(labels), -np.inf)
    for tile_pieces, tmin, tmax in tile_results:
        for code, geom in tile_pieces:
            pieces[code].append(geom)
        vmin = np.minimum(vmin, tmin)
        vmax = np.maximum(vmax, tmax)
    rows = []
    for k, geoms in pieces.items():
        if not geoms:
            continue
        merged = shapely.union_all(np.array(geoms, dtype=object))
        rows.append(
            {
                "band_index": k,
                "band_label": labels[k],
                "band_count": len(labels),
                "justified_aki_min": round(vmin[k], 2),
                "justified_aki_max": round(vmax[k], 2),
                "geometry": merged,
            }
        )
    gdf = (
        gpd.GeoDataFrame(rows, geometry="geometry", crs=ds.crs)
        if rows
        else gpd.GeoDataFrame(
            {
                "band_index": [],
                "band_label": [],
                "band_count": [],
                "justified_aki_min": [],
                "justified_aki_max": [],
            },
            geometry=[],
            crs=ds.crs,
        )
    )
    if len(gdf):
        metric = gdf.to_crs(gdf.estimate_utm_crs()) if ds.crs.is_geographic else gdf
        gdf["area_km2"] = np.round(metric.geometry.area.to_numpy() / 1e6, 2)
    else:
        gdf["area_km2"] = []
    factor = zone_grid_factor(ds, resolution_m)
    stats = {
        "grid_factor": factor,
        "grid_shape": [int(np.ceil(ds.height / factor)), int(np.ceil(ds.width / factor))],
        "tiles": len(tile_results),
        "cell_m": resolution_m if not ds.crs.is_geographic else None,
    }
    return gdf, stats


def justified_zones(
    ds: rasterio.io.DatasetReader,
    *,
    params: FleetModelParams,
    design: DesignDay,
    default_mix: Mapping[str, float],
    fleet_zones: gpd.GeoDataFrame | None,
    share_prefix: str,
    band_edges: Sequence[float],
    resolution_m: float,
    tile_cells: int,
    progress: Callable[[float], None] | None = None,
) -> tuple[gpd.GeoDataFrame, dict]:
    """Polygons of justified-AKI bands over the DEM, in the DEM's CRS.

    Parameters
    ----------
    ds : open DEM (metres above sea level)
    params, design : fleet model and design day (:mod:`pipeline.requirement`)
    default_mix : class shares where no fleet zone covers a cell
    fleet_zones : polygons with ``<share_prefix><class>`` columns, or None
    band_edges : band edges [AKI]
    resolution_m : zone-grid cell size [m] (rounded to a whole number of DEM cells)
    tile_cells : zone-grid tile size [cells]; one tile's DEM window is read at a time,
        decimated on read (average of the DEM cells; GDAL skips nodata)

    Returns
    -------
    (GeoDataFrame with ``band_index``, ``band_label``, ``band_count``, ``area_km2``,
    ``justified_aki_min``, ``justified_aki_max``; stats dict for the manifest)

    Notes
    -----
    The same as :func:`tile_bands` over every tile of :func:`zone_tiles`, then
    :func:`assemble_zones`; a caller may run the tiles in partitions elsewhere.
    """
    tiles = zone_tiles(ds, resolution_m, tile_cells)
    results = []
    for i, tile in enumerate(tiles):
        results += tile_bands(
            ds,
            [tile],
            params=params,
            design=design,
            default_mix=default_mix,
            fleet_zones=fleet_zones,
            share_prefix=share_prefix,
            band_edges=band_edges,
            resolution_m=resolution_m,
        )
        if progress:
            progress((i + 1) / len(tiles))
    return assemble_zones(
        ds, results, band_edges=band_edges, resolution_m=resolution_m, tile_cells=tile_cells
    )
