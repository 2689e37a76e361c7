"""Tests for pipeline.demo (the invented demo region).

Check values are the data contract in /work/helpers/SCHEMA.md ("spec", the project's own
contract: extent, CRS, relief bands, columns) and the generator brief (tiling, compression,
deliberately bad rows). External references: pyproj for the UTM→geographic transform,
rasterio/GDAL for reading the files back, networkx for road connectivity.
"""

from __future__ import annotations

import csv
import re
import time
from datetime import date

import geopandas as gpd
import networkx as nx
import numpy as np
import pandas as pd
import pytest
import rasterio
import shapely
from geopandas.testing import assert_geodataframe_equal
from pyproj import Transformer

from pipeline import demo
from pipeline.demo import (
    DEMO_REFERENCE_DATE,
    OPERATORS,
    STATION_COLUMNS,
    TOWN_NAMES,
    DemoError,
    build_demo_region,
    synthesize_terrain,
)
from pipeline.errors import AltigradeError

SIZE = 250
N_ST = 40

# Real fuel brands and retailers that must never appear (from memory; word-level match).
REAL_BRAND_WORDS = {
    "shell",
    "chevron",
    "exxon",
    "mobil",
    "exxonmobil",
    "texaco",
    "valero",
    "sunoco",
    "citgo",
    "marathon",
    "phillips",
    "conoco",
    "sinclair",
    "arco",
    "esso",
    "bp",
    "amoco",
    "gulf",
    "petro-canada",
    "husky",
    "irving",
    "pemex",
    "speedway",
    "cenex",
    "maverik",
    "casey's",
    "wawa",
    "sheetz",
    "quiktrip",
    "murphy",
    "costco",
    "safeway",
    "kroger",
    "loves",
    "love's",
    "pilot",
    "flying",
    "holiday",
    "circle",
    "76",
    "total",
    "totalenergies",
    "aral",
    "repsol",
    "eni",
    "agip",
    "lukoil",
    "petronas",
    "caltex",
    "ampol",
    "ultramar",
    "pioneer",
    "fas",
    "kwik",
    "getty",
    "hess",
    "tesoro",
    "unocal",
    "stewart's",
    "racetrac",
    "thorntons",
}


@pytest.fixture(scope="module")
def region(tmp_path_factory) -> demo.DemoPaths:
    calls: list[tuple[str, float]] = []
    paths = build_demo_region(
        tmp_path_factory.mktemp("demo_a"),
        size_cells=SIZE,
        n_stations=N_ST,
        progress=lambda m, f: calls.append((m, f)),
    )
    assert calls[0][1] == 0.0 and calls[-1][1] == 1.0
    assert all(b[1] >= a[1] for a, b in zip(calls, calls[1:], strict=False))
    return paths


@pytest.fixture(scope="module")
def stations(region) -> pd.DataFrame:
    return pd.read_csv(region.stations, dtype=str, keep_default_na=False)


@pytest.fixture(scope="module")
def good(stations, region) -> pd.DataFrame:
    g = stations[~stations.station_id.str.startswith("ST-BAD")].copy()
    to_utm = Transformer.from_crs("EPSG:4326", "EPSG:32608", always_xy=True)
    g["x"], g["y"] = to_utm.transform(g.lon.astype(float).values, g.lat.astype(float).values)
    with rasterio.open(region.dem) as src:
        g["z"] = [v[0] for v in src.sample(zip(g.x, g.y, strict=True), masked=True)]
    return g


@pytest.fixture(scope="module")
def terrain() -> demo.DemoTerrain:
    return synthesize_terrain(SIZE)


# ----------------------------------------------------------------------------- files and DEM
def test_files_written(region):
    for p in (region.dem, region.stations, region.towns, region.roads, region.fleet_zones):
        assert p.exists() and p.parent == region.folder
    readme = (region.folder / "README.txt").read_text(encoding="utf-8")
    assert "INVENTED" in readme and "not real places" in readme
    assert "planning aid" in readme and "vehicle maker" in readme and "regulations" in readme


def test_dem_format(region):
    with rasterio.open(region.dem) as src:
        assert src.crs.to_epsg() == 32608  # spec
        assert (src.width, src.height) == (SIZE, SIZE)
        assert src.dtypes == ("float32",)
        assert src.nodata == -9999.0
        assert src.block_shapes == [(256, 256)] and src.profile["tiled"]
        ims = src.tags(ns="IMAGE_STRUCTURE")
        assert ims["COMPRESSION"] == "DEFLATE" and ims["PREDICTOR"] == "3"
        # spec: upper-left corner (300000, 4500000), 180 km square whatever the resolution
        assert tuple(src.bounds) == pytest.approx((300_000, 4_320_000, 480_000, 4_500_000))
        assert src.res == pytest.approx((180_000 / SIZE, 180_000 / SIZE))
        z = src.read(1, masked=True)
    assert 0 < z.mask.sum() < 0.01 * z.size  # a small nodata hole
    assert 190 <= z.min() and z.max() <= 4050


def test_dem_file_matches_pure_terrain(region, terrain):
    with rasterio.open(region.dem) as src:
        z = src.read(1, masked=True).filled(np.nan)
        assert src.transform == terrain.transform
    np.testing.assert_array_equal(z, terrain.elevation)


@pytest.mark.parametrize("seed", [20261201, 7])
@pytest.mark.parametrize(
    ("zone", "lo", "hi"),
    [("plain", 200, 500), ("plateau", 2400, 2900), ("basin", 2400, 2900)],  # spec relief bands
)
def test_zone_elevation_bands(seed, zone, lo, hi):
    t = synthesize_terrain(200 if seed != 20261201 else SIZE, seed)
    z = t.elevation[t.zone(zone)]
    p5, p95 = np.percentile(z, [5, 95])
    assert lo <= p5 and p95 <= hi, (zone, p5, p95)


@pytest.mark.parametrize("seed", [20261201, 7])
def test_range_ridges_and_passes(seed):
    t = synthesize_terrain(SIZE, seed)
    n = SIZE
    v = (np.arange(n) + 0.5) * 180.0 / n
    band = np.abs(t.u_km - 143.0) < 8.0
    crest = np.where(band & np.isfinite(t.elevation), t.elevation, -np.inf).max(axis=1)
    far = np.min([np.abs(v - p) for p in t.pass_rows_km], axis=0) >= 12.0
    # spec: ridges ~3,600–4,000 m, 2–3 passes near 3,300 m
    assert 2 <= len(t.pass_rows_km) <= 3
    assert crest[far].min() >= 3600 and crest[far].max() <= 4000
    for p in t.pass_rows_km:
        saddle = crest[np.abs(v - p) <= 6.0].min()
        assert saddle == pytest.approx(3300, abs=100)
    # the crest profile at each pass point is a saddle: highest across, lowest along
    for px, py in t.pass_points:
        zp = float(demo._sample_elevation(t, np.array([px]), np.array([py]))[0])
        assert zp == pytest.approx(3300, abs=120)


def test_foothills_reach_town_level(terrain):
    z = terrain.elevation[terrain.zone("foothills")]
    assert np.mean((z > 1400) & (z < 1600)) > 0.05  # room for towns near 1,500 m (spec)


def test_terrain_is_deterministic_and_seed_dependent():
    a, b, c = synthesize_terrain(128, 5), synthesize_terrain(128, 5), synthesize_terrain(128, 6)
    assert a.elevation.tobytes() == b.elevation.tobytes()
    assert not np.array_equal(a.elevation, c.elevation, equal_nan=True)


def test_too_small_grid_rejected(tmp_path):
    with pytest.raises(DemoError) as exc:
        synthesize_terrain(10)
    assert isinstance(exc.value, AltigradeError)
    with pytest.raises(DemoError):
        build_demo_region(tmp_path, size_cells=SIZE, n_stations=0)


def test_spectral_noise_normalised():
    rng = np.random.default_rng(0)
    f = demo.spectral_noise((64, 96), 0.5, rng)
    assert f.shape == (64, 96)
    assert abs(f.mean()) < 1e-12 and f.std() == pytest.approx(1.0, rel=1e-12)


# ----------------------------------------------------------------------------- determinism
def test_two_builds_identical(region, tmp_path):
    other = build_demo_region(tmp_path / "b", size_cells=SIZE, n_stations=N_ST)
    assert other.stations.read_bytes() == region.stations.read_bytes()
    with rasterio.open(region.dem) as a, rasterio.open(other.dem) as b:
        assert a.read(1).tobytes() == b.read(1).tobytes()
    for attr, layer in (("towns", "towns"), ("roads", "roads"), ("fleet_zones", "fleet_zones")):
        ga = gpd.read_file(getattr(region, attr), layer=layer)
        gb = gpd.read_file(getattr(other, attr), layer=layer)
        assert_geodataframe_equal(ga, gb)
        assert list(ga.geometry.to_wkb()) == list(gb.geometry.to_wkb())  # bit-identical


def test_other_seed_differs(region, tmp_path):
    other = build_demo_region(tmp_path / "c", size_cells=SIZE, n_stations=N_ST, seed=11)
    assert other.stations.read_bytes() != region.stations.read_bytes()


# ----------------------------------------------------------------------------- towns
def test_towns_layer(region):
    towns = gpd.read_file(region.towns, layer="towns")
    assert towns.crs.to_epsg() == 32608
    assert list(towns.columns) == ["name", "population", "geometry"]
    assert 20 <= len(towns) <= 30
    assert (towns.geometry.geom_type == "Point").all()
    assert towns.name.is_unique and set(towns.name) <= set(TOWN_NAMES)
    assert pd.api.types.is_integer_dtype(towns.population) and (towns.population > 0).all()


def test_towns_by_terrain_class(terrain):
    towns = demo.place_towns(terrain)
    z = {t.kind: [] for t in towns}
    pops = {t.kind: [] for t in towns}
    for t in towns:
        z[t.kind].append(demo._sample_elevation(terrain, np.array([t.x]), np.array([t.y]))[0])
        pops[t.kind].append(t.population)
    # spec: plain 200–500 m, foothill towns near 1,500 m, plateau 2,400–2,900 m, pass villages
    assert all(200 <= e <= 500 for e in z["plain"])
    assert all(1400 <= e <= 1600 for e in z["foothill"])
    assert all(2400 <= e <= 2900 for e in z["plateau"] + z["basin"])
    assert len(z["pass"]) == len(terrain.pass_points)
    assert all(3000 <= e <= 3400 for e in z["pass"])
    assert min(pops["plain"]) > max(pops["plateau"] + pops["pass"] + pops["basin"])
    xy = np.array([(t.x, t.y) for t in towns])
    d = np.hypot(*(xy[:, None, :] - xy[None, :, :]).transpose(2, 0, 1))
    np.fill_diagonal(d, np.inf)
    assert d.min() >= 10_000


# ----------------------------------------------------------------------------- roads
def test_roads_layer_schema(region):
    roads = gpd.read_file(region.roads, layer="roads")
    assert roads.crs.to_epsg() == 32608
    assert {"road_class", "speed_kmh", "aadt", "oneway", "bridge"} <= set(roads.columns)
    assert set(roads.road_class) <= {"highway", "main", "local"}
    assert len(set(roads.road_class)) >= 2
    assert pd.api.types.is_float_dtype(roads.speed_kmh) and pd.api.types.is_float_dtype(roads.aadt)
    assert pd.api.types.is_bool_dtype(roads.oneway) and pd.api.types.is_bool_dtype(roads.bridge)
    assert not roads.oneway.any()
    assert roads.speed_kmh.between(30, 120).all() and (roads.aadt > 0).all()
    assert (roads.geometry.geom_type == "LineString").all() and roads.is_valid.all()
    # busier classes carry more traffic on average
    mean = roads.groupby("road_class").aadt.mean()
    if {"highway", "local"} <= set(mean.index):
        assert mean["highway"] > mean["local"]


def test_roads_connect_all_towns_and_cross_only_at_passes(region, terrain):
    roads = gpd.read_file(region.roads, layer="roads")
    towns = gpd.read_file(region.towns, layer="towns")
    g = nx.Graph()
    for ln in roads.geometry:
        g.add_edge(ln.coords[0], ln.coords[-1])
    town_nodes = [(p.x, p.y) for p in towns.geometry]
    assert set(town_nodes) <= set(g.nodes)  # every town is a road end vertex
    assert nx.is_connected(g.subgraph(nx.node_connected_component(g, town_nodes[0])))
    assert all(nx.has_path(g, town_nodes[0], t) for t in town_nodes)
    # no road climbs over the 3,600 m+ ridges: they use the passes (~3,300 m)
    xy = shapely.get_coordinates(roads.geometry.values)
    zr = demo._sample_elevation(terrain, xy[:, 0], xy[:, 1])
    assert np.nanmax(zr) < 3450
    for px, py in terrain.pass_points:
        assert min(ln.distance(shapely.Point(px, py)) for ln in roads.geometry) < 3_000


def test_roads_are_noded(region):
    lines = list(gpd.read_file(region.roads, layer="roads").geometry)
    tree = shapely.STRtree(lines)
    for i, j in zip(*tree.query(lines, predicate="intersects"), strict=True):
        if i >= j:
            continue
        a, b = lines[i], lines[j]
        ends = {a.coords[0], a.coords[-1]} & {b.coords[0], b.coords[-1]}
        pts = shapely.get_coordinates(a.intersection(b))
        assert all(tuple(p) in ends for p in pts)


# ----------------------------------------------------------------------------- fleet zones
def test_fleet_zones_tile_region(region):
    fz = gpd.read_file(region.fleet_zones, layer="fleet_zones")
    assert fz.crs.to_epsg() == 32608
    assert 3 <= len(fz) <= 4 and fz.zone_id.is_unique
    assert {"zone_id", "zone_name", "share_legacy", "share_modern", "share_boosted"} <= set(fz)
    s = fz.share_legacy + fz.share_modern + fz.share_boosted
    np.testing.assert_allclose(s, 1.0, atol=1e-12)
    assert fz.is_valid.all()
    box = shapely.box(300_000, 4_320_000, 480_000, 4_500_000)
    assert fz.area.sum() == pytest.approx(box.area, rel=1e-9)  # no overlaps …
    assert shapely.union_all(fz.geometry.values).symmetric_difference(box).area < 1.0  # … no gaps
    plateau = fz.loc[fz.zone_name.str.contains("plateau", case=False)].iloc[0]
    assert plateau.share_legacy == fz.share_legacy.max()


# ----------------------------------------------------------------------------- stations
def test_station_columns_follow_schema(region):
    with open(region.stations, encoding="utf-8", newline="") as fh:
        header = next(csv.reader(fh))
    assert tuple(header) == STATION_COLUMNS
    spec = {
        "station_id",
        "name",
        "operator",
        "lon",
        "lat",
        "regular_aki",
        "midgrade_aki",
        "premium_aki",
        "volume_l_per_month",
        "regular_share",
        "last_inspection_date",
        "field_test_aki",
        "field_test_date",
        "past_test_failures",
        "complaints",
    }
    assert set(header) == spec  # SCHEMA.md station table


def test_good_rows_valid(good):
    assert len(good) == N_ST and good.station_id.is_unique
    assert all(re.fullmatch(r"ST-\d{4}", s) for s in good.station_id)
    lon, lat = good.lon.astype(float), good.lat.astype(float)
    assert lon.between(-139, -135).all() and lat.between(38.5, 41).all()
    # positions inside the DEM extent, on valid cells
    assert good.x.between(300_000, 480_000).all() and good.y.between(4_320_000, 4_500_000).all()
    assert not any(np.ma.is_masked(v) for v in good.z)
    reg = good.regular_aki.astype(float)
    assert set(reg) <= {85.0, 86.0, 87.0}
    mid = pd.to_numeric(good.midgrade_aki, errors="coerce")
    prem = pd.to_numeric(good.premium_aki, errors="coerce")
    assert (mid.dropna() <= 89).all() and set(prem.dropna()) <= {91.0, 93.0}
    vol = good.volume_l_per_month.astype(float)
    assert (vol > 0).all() and 60_000 < vol.median() < 350_000
    share = pd.to_numeric(good.regular_share, errors="coerce").dropna()
    assert share.between(0, 1).all()
    assert (good.past_test_failures.astype(int) >= 0).all()
    assert (good.complaints.astype(int) >= 0).all()
    insp = pd.to_datetime(good.last_inspection_date.replace("", None)).dropna().dt.date
    assert insp.between(date(2022, 12, 1), DEMO_REFERENCE_DATE).all()
    ftd = pd.to_datetime(good.field_test_date.replace("", None)).dropna().dt.date
    assert (ftd <= DEMO_REFERENCE_DATE).all()


def test_posted_aki_follows_elevation(terrain):
    roads, _ = demo.build_demo_roads(terrain, demo.place_towns(terrain))
    rows = demo.make_stations(terrain, demo.place_towns(terrain), roads, 200)
    t = pd.DataFrame(rows)
    to_utm = Transformer.from_crs("EPSG:4326", "EPSG:32608", always_xy=True)
    x, y = to_utm.transform(t.lon.astype(float).values, t.lat.astype(float).values)
    z = demo._sample_elevation(terrain, x, y)
    reg = t.regular_aki.astype(float).values
    high = z >= 2200
    assert high.sum() > 20 and np.mean(reg[high] <= 86) >= 0.7
    low = z < 1100
    assert low.sum() > 20 and np.sum(reg[low] != 87) <= 1  # at most the deliberate 86
    # the deliberate exceptions exist: an 85 in the foothills, an 86 at mid elevation
    assert np.any((reg == 85) & (z >= 1100) & (z < 1650))
    assert np.any((reg == 86) & (z >= 600) & (z < 1650))
    # denser in the plain cities
    assert np.mean(z < 500) > 0.4
    # field tests: ~30 %, mostly within ±0.4 of posted, a few 0.8–1.5 below
    ft = pd.to_numeric(t.field_test_aki, errors="coerce").values
    tested = ~np.isnan(ft)
    assert 0.2 < tested.mean() < 0.4
    dev = ft[tested] - reg[tested]
    assert np.mean(np.abs(dev) <= 0.4 + 1e-9) > 0.8
    assert 1 <= np.sum((dev <= -0.8 + 1e-9) & (dev >= -1.5 - 1e-9))
    assert np.all((np.abs(dev) <= 0.4 + 1e-9) | ((dev <= -0.8 + 1e-9) & (dev >= -1.5 - 1e-9)))


def test_bad_rows_present_each_with_its_problem(stations, good):
    bad = stations[stations.station_id.str.startswith("ST-BAD")]
    by = {k: bad[bad.station_id == f"ST-BAD-{k}"] for k in range(1, 8)}
    assert all(len(v) >= 1 for v in by.values())
    assert by[1].lat.iloc[0] == ""
    with pytest.raises(ValueError):
        float(by[2].lon.iloc[0])
    assert float(by[3].regular_aki.iloc[0]) == 870
    assert float(by[4].volume_l_per_month.iloc[0]) < 0
    dup = by[5]
    assert len(dup) == 2 and dup.regular_aki.nunique() == 2 and dup.lon.nunique() == 2
    to_utm = Transformer.from_crs("EPSG:4326", "EPSG:32608", always_xy=True)
    x, y = to_utm.transform(float(by[6].lon.iloc[0]), float(by[6].lat.iloc[0]))
    assert not (300_000 <= x <= 480_000 and 4_320_000 <= y <= 4_500_000)
    assert date.fromisoformat(by[7].field_test_date.iloc[0]) > date(2030, 1, 1)
    assert len(stations) == len(good) + 8


def test_names_unique_and_invented(stations, good, region):
    assert good.name.is_unique
    vocab = set()
    for words in (
        TOWN_NAMES,
        demo._STATION_SUFFIXES,
        demo._QUALIFIERS_TOWN,
        demo._QUALIFIERS_DIR,
        ("Road", "No."),
    ):
        for w in words:
            vocab.update(w.split())
    for name in good.name:
        for w in name.split():
            assert w in vocab or w.isdigit(), f"{w!r} in {name!r} is not from the generator"
    towns = gpd.read_file(region.towns, layer="towns")
    everything = list(stations.name) + list(stations.operator) + list(towns.name) + list(OPERATORS)
    for text in everything:
        for w in re.split(r"[\s.,]+", text.lower()):
            assert w not in REAL_BRAND_WORDS, f"real brand word {w!r} in {text!r}"
    assert set(good.operator) - {""} <= set(OPERATORS) and len(OPERATORS) == 8
    assert len(set(TOWN_NAMES)) == len(TOWN_NAMES)


def test_region_lies_over_open_ocean():
    # spec: origin about 40.6 N, 137.4 W; whole region between 38.5–41 N and 135–139 W
    to_ll = Transformer.from_crs("EPSG:32608", "EPSG:4326", always_xy=True)
    for x, y in [(300_000, 4_500_000), (480_000, 4_320_000), (300_000, 4_320_000)]:
        lon, lat = to_ll.transform(x, y)
        assert -139 < lon < -135 and 38.5 < lat < 41
    lon0, lat0 = to_ll.transform(300_000, 4_500_000)
    assert lat0 == pytest.approx(40.6, abs=0.1) and lon0 == pytest.approx(-137.4, abs=0.1)


def test_small_build_is_fast(tmp_path):
    t0 = time.perf_counter()
    build_demo_region(tmp_path, size_cells=SIZE, n_stations=N_ST)
    assert time.perf_counter() - t0 < 10.0
    assert not list(tmp_path.glob(".*partial*"))  # no leftovers
