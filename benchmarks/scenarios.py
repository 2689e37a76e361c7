"""Synthetic, seeded scale scenarios for the benchmarks (generated on demand, never committed).

Two scenarios, each with a ``--quick`` variant that is much smaller:

| scenario | DEM | stations | road edges |
|---|---|---|---|
| ``state`` | GeoTIFF 5 000 × 5 000 (36 m) | 3 000 | ≈ 507 000 |
| ``state`` quick | GeoTIFF 2 000 × 2 000 (90 m) | 600 | ≈ 49 000 |
| ``national`` | VRT of 4 × 4 tiles of 5 120 × 5 120 (30 m), 419 M cells | 150 000 | ≈ 2.0 M |
| ``national`` quick | VRT of 2 × 2 tiles of 1 024 × 1 024 (30 m) | 15 000 | ≈ 33 000 |

The state grids span the demo region's 180 km; road networks are perturbed grids (the national
one with a ``region_id`` column, one region per DEM tile, ``R01``…).

Every DEM is float32, tiled 256 × 256, DEFLATE (floating-point predictor), nodata −9999, in
EPSG:32608 with the demo region's upper-left corner (x = 300 000 m, y = 4 500 000 m — open
Pacific Ocean, see SCHEMA.md). The state terrain is :func:`pipeline.demo.synthesize_terrain`
at 5 000 cells, its towns and fleet zones those of the demo generator and its stations
:func:`pipeline.demo.make_stations` (plus the deliberately malformed rows). The national terrain
is a smooth fractal macro relief on a 600 m grid, interpolated bilinearly to 30 m and roughened
with two periodic fractal patches, so tiles join without seams and are made one at a time
(memory stays bounded by one tile). Each scenario folder also holds the stations CSV (columns
of SCHEMA.md), ``towns.gpkg``, ``roads.gpkg``, ``fleet_zones.gpkg`` and a run config
``run.toml`` for ``altigrade run``.

Scenarios are cached under ``benchmarks/data/<name>/`` (git-ignored); ``scenario.json`` is
written last and records the parameters, so a half-built or outdated folder is rebuilt.

All data are INVENTED: terrain, towns, roads, stations and operators are not real. The region
lies over open ocean on purpose. A planning aid: follow the vehicle maker's fuel
recommendation, and defer to local fuel regulations and licensed practice.

Usage::

    python benchmarks/scenarios.py state|national [--quick] [--force]
"""

from __future__ import annotations

import argparse
import json
import math
import shutil
import sys
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
if str(REPO) not in sys.path:  # run as a script from anywhere
    sys.path.insert(0, str(REPO))

__all__ = [
    "DATA_DIR",
    "SCENARIO_VERSION",
    "Scenario",
    "ScenarioSpec",
    "SPECS",
    "get_scenario",
    "perturbed_grid_roads",
    "write_vrt_mosaic",
]

#: Bump when the generated content changes, so cached folders are rebuilt.
SCENARIO_VERSION = 1
DATA_DIR = Path(__file__).resolve().parent / "data"

CRS = "EPSG:32608"
ORIGIN_M = (300_000.0, 4_500_000.0)  # upper-left corner (x, y) [m], SCHEMA.md
NODATA = -9999.0
BLOCK = 256

_DEM_PROFILE = {
    "driver": "GTiff",
    "dtype": "float32",
    "count": 1,
    "crs": CRS,
    "nodata": NODATA,
    "tiled": True,
    "blockxsize": BLOCK,
    "blockysize": BLOCK,
    "compress": "deflate",
    "predictor": 3,
    "num_threads": "ALL_CPUS",
}

_CAUTION = (
    "A planning aid: follow the vehicle maker's fuel recommendation, and defer to local fuel "
    "regulations and licensed practice."
)


@dataclass(frozen=True)
class ScenarioSpec:
    """Parameters of one scenario (the cache records them).

    Attributes
    ----------
    name : folder name under ``benchmarks/data``.
    kind : "state" (one GeoTIFF) or "national" (VRT mosaic of tiles).
    dem_cells : grid side [cells] ("state") or tile side [cells] ("national").
    tiles_per_side : tiles per side of the national mosaic (1 for "state").
    cell_m : national cell size [m] (the state cell is 180 km / dem_cells).
    n_stations : good station rows (a few malformed rows come on top).
    road_nodes_per_side : nodes per side of the perturbed road grid.
    seed : random seed.
    """

    name: str
    kind: str
    dem_cells: int
    tiles_per_side: int
    cell_m: float
    n_stations: int
    road_nodes_per_side: int
    seed: int


SPECS: dict[tuple[str, bool], ScenarioSpec] = {
    ("state", False): ScenarioSpec("state", "state", 5000, 1, 36.0, 3000, 512, 20270101),
    ("state", True): ScenarioSpec("state-quick", "state", 2000, 1, 90.0, 600, 160, 20270101),
    ("national", False): ScenarioSpec(
        "national", "national", 5120, 4, 30.0, 150_000, 1025, 20270102
    ),
    ("national", True): ScenarioSpec(
        "national-quick", "national", 1024, 2, 30.0, 15_000, 130, 20270102
    ),
}


@dataclass(frozen=True)
class Scenario:
    """A generated scenario on disk."""

    spec: ScenarioSpec
    folder: Path
    config: Path
    dem: Path
    stations: Path
    roads: Path
    towns: Path
    fleet_zones: Path
    meta: dict

    @property
    def dem_files(self) -> list[Path]:
        """The DEM file and, for a VRT, its tiles."""
        return [self.dem, *(self.folder / t for t in self.meta.get("dem_tiles", []))]

    @property
    def input_files(self) -> list[Path]:
        """Every input file the run config names (VRT tiles included)."""
        return [self.stations, *self.dem_files, self.roads, self.towns, self.fleet_zones]


def _paths(spec: ScenarioSpec, folder: Path, meta: dict) -> Scenario:
    dem = folder / ("dem.vrt" if spec.kind == "national" else "dem.tif")
    return Scenario(
        spec,
        folder,
        folder / "run.toml",
        dem,
        folder / "stations.csv",
        folder / "roads.gpkg",
        folder / "towns.gpkg",
        folder / "fleet_zones.gpkg",
        meta,
    )


def get_scenario(
    kind: str,
    quick: bool = False,
    *,
    data_dir: Path = DATA_DIR,
    force: bool = False,
    log: Callable[[str], None] = print,
) -> Scenario:
    """The scenario ``kind`` ("state" or "national"), generated unless a matching cache exists.

    Raises
    ------
    KeyError
        Unknown kind.
    FileExistsError
        The scenario's folder exists but holds something other than a generated scenario.
    """
    try:
        spec = SPECS[(kind, bool(quick))]
    except KeyError:
        raise KeyError(f"unknown scenario {kind!r}; valid: state, national") from None
    folder = Path(data_dir) / spec.name
    marker = folder / "scenario.json"
    want = {"version": SCENARIO_VERSION, "spec": asdict(spec)}
    if not force and marker.exists():
        try:
            meta = json.loads(marker.read_text(encoding="utf-8"))
            if {k: meta.get(k) for k in want} == want:
                sc = _paths(spec, folder, meta)
                if all(p.exists() for p in sc.input_files + [sc.config]):
                    return sc
        except (OSError, ValueError):
            pass
    if folder.exists():
        partial = folder / ".scenario-partial"
        if not (marker.exists() or partial.exists() or not any(folder.iterdir())):
            raise FileExistsError(f"{folder} exists and is not a generated scenario; not replaced")
        shutil.rmtree(folder)
    folder.mkdir(parents=True)
    (folder / ".scenario-partial").touch()  # marks a folder being generated (safe to replace)
    t0 = time.perf_counter()
    log(f"generating scenario {spec.name} in {folder} ...")
    build = _build_state if spec.kind == "state" else _build_national
    meta = build(spec, folder, log)
    meta.update(want)
    meta["generation_s"] = round(time.perf_counter() - t0, 1)
    sc = _paths(spec, folder, meta)
    _write_config(sc)
    (folder / "README.txt").write_text(_readme(spec), encoding="utf-8")
    marker.write_text(json.dumps(meta, indent=2), encoding="utf-8")
    (folder / ".scenario-partial").unlink(missing_ok=True)
    log(f"scenario {spec.name} ready in {meta['generation_s']} s")
    return sc


# ------------------------------------------------------------------------------ writing helpers
def _write_gpkg(gdf, path: Path, layer: str, append: bool = False) -> None:
    import pyogrio

    pyogrio.write_dataframe(gdf, path, layer=layer, driver="GPKG", append=append)


def _write_config(sc: Scenario) -> None:
    text = f"""# altigrade run config for the synthetic benchmark scenario {sc.spec.name!r}.
# INVENTED data generated by benchmarks/scenarios.py; paths relative to this file.
# {_CAUTION}

name = "bench-{sc.spec.name}"

[inputs]
stations = "{sc.stations.name}"
stations_crs = "EPSG:4326"
dem = "{sc.dem.name}"
roads = "{sc.roads.name}"
towns = "{sc.towns.name}"
fleet_zones = "{sc.fleet_zones.name}"

[design_day]
temperature_offset_k = 15.0
relative_humidity_pct = 30.0

[outputs]
crs = "EPSG:4326"

[execution]
reuse_unchanged_stages = false
"""
    sc.config.write_text(text, encoding="utf-8")
    from pipeline.config import load_config

    load_config(sc.config)  # fail here, not in the benchmark, if the keys are out of date


def _readme(spec: ScenarioSpec) -> str:
    return (
        f"altigrade benchmark scenario {spec.name} — INVENTED DATA\n\n"
        "Generated by benchmarks/scenarios.py from a random seed. Terrain, towns, roads, "
        "fleet zones, stations, operators and all names are invented, not real places, "
        "companies or measurements. The region (EPSG:32608, upper-left x=300000 "
        "y=4500000) lies over open ocean on purpose.\n\n"
        f"{_CAUTION}\n"
    )


def perturbed_grid_roads(
    x0: float,
    y0: float,
    width_m: float,
    height_m: float,
    nodes_per_side: int,
    rng: np.random.Generator,
    *,
    drop_share: float = 0.03,
    region_of: Callable[[np.ndarray, np.ndarray], np.ndarray] | None = None,
):
    """A perturbed square road grid as LineStrings with the SCHEMA.md road attributes.

    Parameters
    ----------
    x0, y0 : upper-left corner [m]; width_m, height_m : extent [m].
    nodes_per_side : grid nodes per side (edges ≈ 2·n·(n−1)·(1 − drop_share)).
    rng : random source (node jitter, bends, attributes, dropped edges).
    drop_share : share of edges removed at random (gaps in the grid) [–].
    region_of : optional ``f(x, y) -> labels`` giving a ``region_id`` per edge midpoint.

    Returns
    -------
    GeoDataFrame (EPSG:32608): three-vertex LineStrings (a bent midpoint), ``road_class``
    (every 40th grid line "highway", every 8th "main", else "local"), ``speed_kmh``, ``aadt``
    (lognormal around a class median), ``oneway`` (≈ 1 %), ``bridge`` (≈ 1 %).
    Invented layout.
    """
    import geopandas as gpd
    import pandas as pd
    import shapely

    n = int(nodes_per_side)
    sx, sy = width_m / (n - 1), height_m / (n - 1)
    r, c = np.divmod(np.arange(n * n), n)
    jit = 0.25
    nx = x0 + c * sx + rng.uniform(-jit, jit, n * n) * sx * (0 < c) * (c < n - 1)
    ny = y0 - r * sy + rng.uniform(-jit, jit, n * n) * sy * (0 < r) * (r < n - 1)
    idx = np.arange(n * n).reshape(n, n)
    u = np.r_[idx[:, :-1].ravel(), idx[:-1, :].ravel()]
    v = np.r_[idx[:, 1:].ravel(), idx[1:, :].ravel()]
    line_no = np.r_[np.repeat(np.arange(n), n - 1), np.tile(np.arange(n), n - 1)]
    keep = rng.random(u.size) >= drop_share
    u, v, line_no = u[keep], v[keep], line_no[keep]
    m = u.size
    mx = 0.5 * (nx[u] + nx[v])
    my = 0.5 * (ny[u] + ny[v])
    dx, dy = nx[v] - nx[u], ny[v] - ny[u]
    bend = rng.normal(0.0, 0.06, m)  # sideways bend of the midpoint, share of the length
    mx, my = mx - dy * bend, my + dx * bend
    coords = np.stack(
        [np.c_[nx[u], ny[u]], np.c_[mx, my], np.c_[nx[v], ny[v]]], axis=1
    )  # (m, 3, 2)
    geom = shapely.linestrings(coords)
    cls = np.where(line_no % 40 == 0, "highway", np.where(line_no % 8 == 0, "main", "local"))
    speed = np.select([cls == "highway", cls == "main"], [100.0, 80.0], 60.0)
    median = np.select([cls == "highway", cls == "main"], [9000.0, 2500.0], 300.0)
    aadt = np.round(median * rng.lognormal(0.0, 0.5, m), -1)
    data = {
        "road_class": cls,
        "speed_kmh": speed,
        "aadt": aadt,
        "oneway": rng.random(m) < 0.01,
        "bridge": rng.random(m) < 0.01,
    }
    if region_of is not None:
        data["region_id"] = region_of(mx, my)
    return gpd.GeoDataFrame(pd.DataFrame(data), geometry=geom, crs=CRS)


def write_vrt_mosaic(
    path: Path,
    tiles: list[tuple[str, int, int, int, int]],
    width: int,
    height: int,
    transform,
    crs_wkt: str,
    nodata: float,
    block: int = BLOCK,
) -> None:
    """Write a one-band Float32 VRT mosaic (GDAL Virtual Format XML) of GeoTIFF tiles.

    Parameters
    ----------
    path : the .vrt file; tile names are written relative to its folder.
    tiles : (file name, column offset, row offset, width, height) [cells] per tile.
    width, height : mosaic size [cells]; transform : its affine transform; crs_wkt : its CRS.
    nodata : nodata value; block : VRT block size [cells] (tiles should be a multiple of it,
    so that VRT blocks never straddle two tiles).

    References
    ----------
    GDAL documentation, "VRT -- GDAL Virtual Format" (``VRTDataset``, ``ComplexSource``).
    """
    from xml.sax.saxutils import escape

    t = transform
    sources = []
    for name, xoff, yoff, w, h in tiles:
        sources.append(
            "    <ComplexSource>\n"
            f'      <SourceFilename relativeToVRT="1">{escape(name)}</SourceFilename>\n'
            "      <SourceBand>1</SourceBand>\n"
            f'      <SourceProperties RasterXSize="{w}" RasterYSize="{h}" DataType="Float32" '
            f'BlockXSize="{block}" BlockYSize="{block}"/>\n'
            f'      <SrcRect xOff="0" yOff="0" xSize="{w}" ySize="{h}"/>\n'
            f'      <DstRect xOff="{xoff}" yOff="{yoff}" xSize="{w}" ySize="{h}"/>\n'
            f"      <NODATA>{nodata:g}</NODATA>\n"
            "    </ComplexSource>\n"
        )
    xml = (
        f'<VRTDataset rasterXSize="{width}" rasterYSize="{height}">\n'
        f'  <SRS dataAxisToSRSAxisMapping="1,2">{escape(crs_wkt)}</SRS>\n'
        f"  <GeoTransform>{t.c!r}, {t.a!r}, {t.b!r}, {t.f!r}, {t.d!r}, {t.e!r}</GeoTransform>\n"
        f'  <VRTRasterBand dataType="Float32" band="1" blockXSize="{block}" '
        f'blockYSize="{block}">\n'
        f"    <NoDataValue>{nodata:g}</NoDataValue>\n"
        f"{''.join(sources)}"
        "  </VRTRasterBand>\n"
        "</VRTDataset>\n"
    )
    tmp = path.with_name(f".{path.name}.partial")
    tmp.write_text(xml, encoding="utf-8")
    tmp.replace(path)


# ----------------------------------------------------------------------------------------- state
def _build_state(spec: ScenarioSpec, folder: Path, log: Callable[[str], None]) -> dict:
    import geopandas as gpd
    import rasterio
    from shapely.geometry import Point

    from pipeline import demo

    t = time.perf_counter()
    terrain = demo.synthesize_terrain(spec.dem_cells, spec.seed)
    log(f"  terrain {spec.dem_cells}² in {time.perf_counter() - t:.1f} s")
    z = np.where(np.isnan(terrain.elevation), np.float32(NODATA), terrain.elevation)
    profile = dict(_DEM_PROFILE, width=z.shape[1], height=z.shape[0], transform=terrain.transform)
    t = time.perf_counter()
    with rasterio.open(folder / "dem.tif", "w", **profile) as dst:
        dst.write(z.astype(np.float32), 1)
        dst.update_tags(source="altigrade benchmark scenario: INVENTED terrain", units="m")
    del z
    log(f"  dem.tif written in {time.perf_counter() - t:.1f} s")

    towns = demo.place_towns(terrain, spec.seed)
    rng = np.random.default_rng([spec.seed, 3])
    t = time.perf_counter()
    roads = perturbed_grid_roads(
        *ORIGIN_M, demo.DEMO_EXTENT_M, demo.DEMO_EXTENT_M, spec.road_nodes_per_side, rng
    )
    _write_gpkg(roads, folder / "roads.gpkg", "roads")
    log(f"  {len(roads):,} road edges in {time.perf_counter() - t:.1f} s")
    towns_gdf = gpd.GeoDataFrame(
        {"name": [t.name for t in towns], "population": [int(t.population) for t in towns]},
        geometry=[Point(t.x, t.y) for t in towns],
        crs=CRS,
    )
    _write_gpkg(towns_gdf, folder / "towns.gpkg", "towns")
    _write_gpkg(demo.fleet_zone_polygons(terrain), folder / "fleet_zones.gpkg", "fleet_zones")
    t = time.perf_counter()
    rows = demo.make_stations(terrain, towns, roads, spec.n_stations, spec.seed)
    rows += demo.bad_station_rows(rows[0])
    (folder / "stations.csv").write_text(demo.station_csv_text(rows), encoding="utf-8")
    log(f"  {len(rows):,} station rows in {time.perf_counter() - t:.1f} s")
    return {
        "dem_shape": list(terrain.elevation.shape),
        "dem_cells": int(terrain.elevation.size),
        "cell_m": float(terrain.transform.a),
        "road_edges": int(len(roads)),
        "towns": len(towns),
        "station_rows": len(rows),
        "dem_tiles": [],
    }


# -------------------------------------------------------------------------------------- national
_COARSE_M = 600.0  # macro relief grid [m]
_PLACE_WORDS = (
    "Vale",
    "Ford",
    "Cross",
    "Reach",
    "Landing",
    "Heights",
    "Hollow",
    "Junction",
    "Bend",
    "Flats",
    "Springs",
    "Gap",
)


def _interp_matrix(q: np.ndarray, k: int) -> tuple[np.ndarray, int]:
    """Dense linear-interpolation matrix from a 1-D grid of ``k`` nodes to positions ``q``
    (node-index units, clamped); returns (matrix restricted to the nodes used, first node)."""
    q = np.clip(q, 0.0, k - 1.0)
    i0 = np.minimum(np.floor(q).astype(np.int64), k - 2)
    f = q - i0
    base = int(i0.min())
    a = np.zeros((q.size, int(i0.max()) - base + 2))
    rows = np.arange(q.size)
    a[rows, i0 - base] = 1.0 - f
    a[rows, i0 - base + 1] = f
    return a, base


def _national_fields(spec: ScenarioSpec) -> dict[str, np.ndarray]:
    """The macro relief [m] on the 600 m grid, the lake field and two periodic detail patches."""
    from pipeline.demo import spectral_noise

    rng = np.random.default_rng([spec.seed, 10])
    side_m = spec.dem_cells * spec.tiles_per_side * spec.cell_m
    k = int(math.ceil(side_m / _COARSE_M)) + 1
    ck = _COARSE_M / 1000.0
    hills = spectral_noise((k, k), ck, rng, beta=3.2, min_wavelength_km=3.0, max_wavelength_km=250)
    ridge = spectral_noise((k, k), ck, rng, beta=2.8, min_wavelength_km=4.0, max_wavelength_km=80)
    lake = spectral_noise((k, k), ck, rng, beta=3.0, min_wavelength_km=3.0, max_wavelength_km=30)
    crest = np.clip(1.0 - np.abs(ridge), 0.0, 1.0) ** 3  # narrow ridge lines
    macro = 1500.0 + 1100.0 * np.tanh(hills / 1.3) + 1300.0 * crest * (0.5 + 0.5 * np.tanh(hills))
    macro = np.maximum(macro, 150.0)
    cell_km = spec.cell_m / 1000.0
    p1 = spectral_noise(
        (1024, 1024), cell_km, rng, beta=2.6, min_wavelength_km=0.09, max_wavelength_km=8.0
    )
    p2 = spectral_noise(
        (997, 997), cell_km, rng, beta=2.2, min_wavelength_km=0.06, max_wavelength_km=2.0
    )
    return {"macro": macro, "lake": lake, "p1": p1.astype(np.float32), "p2": p2.astype(np.float32)}


def _national_tile(fields: dict[str, np.ndarray], spec: ScenarioSpec, ti: int, tj: int):
    """Elevation [m] (float32, NODATA on lakes) of tile (row ti, column tj)."""
    n = spec.dem_cells
    scale = spec.cell_m / _COARSE_M
    rows = ti * n + np.arange(n)
    cols = tj * n + np.arange(n)
    k = fields["macro"].shape[0]
    ar, r0 = _interp_matrix((rows + 0.5) * scale, k)
    ac, c0 = _interp_matrix((cols + 0.5) * scale, k)
    sub = np.s_[r0 : r0 + ar.shape[1], c0 : c0 + ac.shape[1]]
    macro = ar @ fields["macro"][sub] @ ac.T
    lake = ar @ fields["lake"][sub] @ ac.T
    p1, p2 = fields["p1"], fields["p2"]
    detail = p1[np.ix_(rows % p1.shape[0], cols % p1.shape[1])]
    detail += 0.5 * p2[np.ix_(rows % p2.shape[0], cols % p2.shape[1])]
    rel = np.clip((macro - 150.0) / 3500.0, 0.0, 1.0)
    z = (macro + (15.0 + 90.0 * rel) * detail).astype(np.float32)
    z[(lake > 2.4) & (macro < 2600.0)] = NODATA
    return z


def _build_national(spec: ScenarioSpec, folder: Path, log: Callable[[str], None]) -> dict:
    import geopandas as gpd
    import pandas as pd
    import rasterio
    from rasterio.transform import from_origin
    from scipy.spatial import cKDTree
    from shapely.geometry import Point, box

    from pipeline import demo, terrain

    n, m = spec.dem_cells, spec.tiles_per_side
    side_m = n * m * spec.cell_m
    x0, y0 = ORIGIN_M
    t = time.perf_counter()
    fields = _national_fields(spec)
    tiles = []
    for ti in range(m):
        for tj in range(m):
            name = f"dem_r{ti:02d}_c{tj:02d}.tif"
            tr = from_origin(
                x0 + tj * n * spec.cell_m, y0 - ti * n * spec.cell_m, spec.cell_m, spec.cell_m
            )
            z = _national_tile(fields, spec, ti, tj)
            prof = dict(_DEM_PROFILE, width=n, height=n, transform=tr)
            tmp = folder / f".{name}.partial"
            with rasterio.open(tmp, "w", **prof) as dst:
                dst.write(z, 1)
            tmp.replace(folder / name)
            del z
            tiles.append((name, tj * n, ti * n, n, n))
            log(f"  tile {len(tiles)}/{m * m} ({time.perf_counter() - t:.0f} s)")
    with rasterio.open(folder / tiles[0][0]) as ds:
        wkt = ds.crs.to_wkt()
    write_vrt_mosaic(
        folder / "dem.vrt",
        tiles,
        n * m,
        n * m,
        from_origin(x0, y0, spec.cell_m, spec.cell_m),
        wkt,
        NODATA,
    )
    region_m = side_m / m

    def region_of(x: np.ndarray, y: np.ndarray) -> np.ndarray:
        rj = np.clip(((x - x0) // region_m).astype(int), 0, m - 1)
        ri = np.clip(((y0 - y) // region_m).astype(int), 0, m - 1)
        return np.char.add("R", np.char.zfill((ri * m + rj + 1).astype(str), 2))

    rng = np.random.default_rng([spec.seed, 3])
    t = time.perf_counter()
    roads = perturbed_grid_roads(
        x0, y0, side_m, side_m, spec.road_nodes_per_side, rng, region_of=region_of
    )
    n_edges = len(roads)
    for k, (_, part) in enumerate(roads.groupby("region_id", sort=True)):
        _write_gpkg(part, folder / "roads.gpkg", "roads", append=k > 0)
    del roads
    log(f"  {n_edges:,} road edges in {time.perf_counter() - t:.1f} s")

    # fleet zones: one per region, invented shares
    zr = np.random.default_rng([spec.seed, 4])
    zones = []
    for ri in range(m):
        for rj in range(m):
            legacy = round(float(zr.uniform(0.05, 0.3)), 2)
            boosted = round(float(zr.uniform(0.05, 0.25)), 2)
            zones.append(
                {
                    "zone_id": f"FZ-R{ri * m + rj + 1:02d}",
                    "zone_name": f"Region {ri * m + rj + 1} fleet",
                    "share_legacy": legacy,
                    "share_modern": round(1.0 - legacy - boosted, 2),
                    "share_boosted": boosted,
                    "geometry": box(
                        x0 + rj * region_m,
                        y0 - (ri + 1) * region_m,
                        x0 + (rj + 1) * region_m,
                        y0 - ri * region_m,
                    ),
                }
            )
    _write_gpkg(gpd.GeoDataFrame(zones, crs=CRS), folder / "fleet_zones.gpkg", "fleet_zones")

    with rasterio.open(folder / "dem.vrt") as ds:

        def elevation(x, y):
            return terrain.sample_dem(ds, x, y).value

        # towns: 24 per region on valid ground, log-uniform populations
        tr_ = np.random.default_rng([spec.seed, 5])
        n_towns = 24 * m * m
        tx, ty = np.empty(0), np.empty(0)
        while tx.size < n_towns:
            x = x0 + tr_.uniform(3000, side_m - 3000, 4 * n_towns)
            y = y0 - tr_.uniform(3000, side_m - 3000, 4 * n_towns)
            ok = np.isfinite(elevation(x, y))
            tx, ty = np.r_[tx, x[ok]][:n_towns], np.r_[ty, y[ok]][:n_towns]
        pop = np.round(np.exp(tr_.uniform(math.log(500), math.log(250_000), n_towns)), -1)
        base = [f"{a} {w}" for w in _PLACE_WORDS for a in demo.TOWN_NAMES]
        names = [
            base[i % len(base)] + ("" if i < len(base) else f" {i // len(base) + 1}")
            for i in tr_.permutation(n_towns)
        ]
        towns = gpd.GeoDataFrame(
            {"name": names, "population": pop.astype(np.int64)},
            geometry=[Point(a, b) for a, b in zip(tx, ty, strict=True)],
            crs=CRS,
        )
        _write_gpkg(towns, folder / "towns.gpkg", "towns")

        t = time.perf_counter()
        sx, sy, selev = _national_station_points(spec, tx, ty, pop, side_m, elevation)
    frame = _station_frame(spec, sx, sy, selev, cKDTree(np.c_[tx, ty]), names)
    rows = frame.to_dict("records")
    template = {k: "" if pd.isna(v) else str(v) for k, v in rows[0].items()}
    bad = pd.DataFrame(demo.bad_station_rows(template))
    frame = pd.concat([frame, bad], ignore_index=True)
    frame = frame[list(demo.STATION_COLUMNS)]
    frame.to_csv(folder / "stations.csv", index=False, na_rep="", lineterminator="\n")
    log(f"  {len(frame):,} station rows in {time.perf_counter() - t:.1f} s")
    return {
        "dem_shape": [n * m, n * m],
        "dem_cells": int((n * m) ** 2),
        "cell_m": spec.cell_m,
        "road_edges": int(n_edges),
        "towns": int(n_towns),
        "station_rows": int(len(frame)),
        "dem_tiles": [tl[0] for tl in tiles],
    }


def _national_station_points(spec, tx, ty, pop, side_m, elevation):
    """55 % of stations scattered around towns (weight ∝ population^0.7), the rest beside the
    grid roads; only points on valid DEM cells are kept. Invented rules."""
    rng = np.random.default_rng([spec.seed, 6])
    x0, y0 = ORIGIN_M
    n = spec.n_stations
    w = pop**0.7 / (pop**0.7).sum()
    spacing = side_m / (spec.road_nodes_per_side - 1)
    xs, ys, zs = [np.empty(0)] * 3
    while xs.size < n:
        k = 2 * n
        ti = rng.choice(tx.size, k, p=w)
        sig = (0.4 + 0.5 * (pop[ti] / 1e4) ** 0.4) * 1000.0
        xt, yt = tx[ti] + rng.normal(0, 1, k) * sig, ty[ti] + rng.normal(0, 1, k) * sig
        line = rng.integers(0, spec.road_nodes_per_side, k) * spacing
        along = rng.uniform(0, side_m, k)
        off = rng.uniform(30, 80, k) * rng.choice([-1.0, 1.0], k)
        horiz = rng.random(k) < 0.5
        xr = x0 + np.where(horiz, along, line + off)
        yr = y0 - np.where(horiz, line + off, along)
        town = np.arange(k) < int(0.55 * k)  # 55 % near towns, 45 % beside roads
        x, y = np.where(town, xt, xr), np.where(town, yt, yr)
        inside = (x > x0 + 1000) & (x < x0 + side_m - 1000) & (y < y0 - 1000)
        inside &= y > y0 - side_m + 1000
        x, y = x[inside], y[inside]
        z = elevation(x, y)
        ok = np.isfinite(z)
        xs, ys, zs = np.r_[xs, x[ok]], np.r_[ys, y[ok]], np.r_[zs, z[ok]]
    sel = rng.permutation(xs.size)[:n]
    return np.round(xs[sel], 1), np.round(ys[sel], 1), zs[sel]


def _station_frame(spec, x, y, elev, tree, town_names):
    """The station table (SCHEMA.md columns) for points with known elevation; vectorised
    version of the demo's rules (posted AKI by elevation band, field tests, volumes)."""
    import pandas as pd
    from pyproj import Transformer

    from pipeline import demo

    rng = np.random.default_rng([spec.seed, 7])
    n = x.size
    lon, lat = Transformer.from_crs(CRS, "EPSG:4326", always_xy=True).transform(x, y)
    reg = np.full(n, 87.0)
    hi = elev >= 2200.0
    mid = (elev >= 1650.0) & ~hi
    reg[hi] = rng.choice([85.0, 86.0, 87.0], size=hi.sum(), p=[0.55, 0.35, 0.10])
    reg[mid] = rng.choice([85.0, 86.0, 87.0], size=mid.sum(), p=[0.10, 0.50, 0.40])
    odd = rng.random(n) < 0.002  # a few deliberate exceptions at low elevation
    reg[odd & (elev < 1650.0)] = 85.0
    mid_aki = np.where(reg <= 86.0, rng.choice([88.0, 89.0], n, p=[0.6, 0.4]), 89.0)
    mid_aki[rng.random(n) < 0.3] = np.nan
    prem = np.where(
        elev >= 1650.0,
        rng.choice([91.0, 93.0], n, p=[0.85, 0.15]),
        rng.choice([91.0, 93.0], n, p=[0.5, 0.5]),
    )
    prem[rng.random(n) < 0.08] = np.nan
    volume = np.round(rng.lognormal(math.log(150_000.0), 0.55, n), -2)
    share = np.round(rng.uniform(0.62, 0.86, n), 2)
    share[rng.random(n) < 0.1] = np.nan
    ref = demo.DEMO_REFERENCE_DATE
    insp = pd.Series(pd.to_datetime(ref) - pd.to_timedelta(rng.integers(0, 4 * 365, n), "D"))
    insp = insp.dt.strftime("%Y-%m-%d").where(rng.random(n) >= 0.06, "")
    tested = rng.random(n) < 0.30
    low = tested & (rng.random(n) < 0.1)
    ft = reg + np.clip(rng.normal(0.0, 0.2, n), -0.4, 0.4)
    ft[low] = reg[low] - rng.uniform(0.8, 1.5, low.sum())
    ft = np.where(tested, np.round(ft, 1), np.nan)
    ftd = pd.Series(pd.to_datetime(ref) - pd.to_timedelta(rng.integers(1, 720, n), "D"))
    ftd = ftd.dt.strftime("%Y-%m-%d").where(tested, "")
    failures = np.where(low, 1 + rng.poisson(0.8, n), rng.poisson(0.12, n))
    complaints = rng.poisson(0.6, n) + np.where(low, 2, 0)
    _, near = tree.query(np.c_[x, y])
    suffix = np.array(["Fuel", "Fuel Stop", "Pumps", "Filling Post", "Roadhouse", "Service"])
    town = np.asarray(town_names, dtype=object)[near]
    names = [
        f"{t} {s} {k + 1}"
        for k, (t, s) in enumerate(zip(town, suffix[rng.integers(0, suffix.size, n)], strict=True))
    ]
    operator = np.asarray(demo.OPERATORS, dtype=object)[rng.integers(0, len(demo.OPERATORS), n)]
    operator[rng.random(n) < 0.03] = ""
    return pd.DataFrame(
        {
            "station_id": [f"NS-{k + 1:06d}" for k in range(n)],
            "name": names,
            "operator": operator,
            "lon": np.round(lon, 6),
            "lat": np.round(lat, 6),
            "regular_aki": reg,
            "midgrade_aki": mid_aki,
            "premium_aki": prem,
            "volume_l_per_month": volume,
            "regular_share": share,
            "last_inspection_date": insp.to_numpy(),
            "field_test_aki": ft,
            "field_test_date": ftd.to_numpy(),
            "past_test_failures": failures,
            "complaints": complaints,
        }
    )


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="Generate (or reuse) a synthetic scale scenario.")
    ap.add_argument("kind", choices=["state", "national"])
    ap.add_argument("--quick", action="store_true", help="the much smaller variant")
    ap.add_argument("--force", action="store_true", help="regenerate even if cached")
    ap.add_argument("--data-dir", type=Path, default=DATA_DIR)
    args = ap.parse_args(argv)
    sc = get_scenario(args.kind, args.quick, data_dir=args.data_dir, force=args.force)
    print(json.dumps({k: v for k, v in sc.meta.items() if k != "dem_tiles"}, indent=2))
    print(f"config: {sc.config}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
