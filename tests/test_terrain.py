"""DEM sampling against rasterio's own reading and an independent bilinear interpolator."""

from __future__ import annotations

import numpy as np
import pytest
import rasterio
from rasterio.transform import from_origin

from pipeline import terrain


@pytest.fixture(scope="module")
def jacksboro_tif(tmp_path_factory):
    """A real SRTM-derived DEM shipped with matplotlib (sample data `jacksboro_fault_dem.npz`,
    3 arc-second cells, lon/lat bounds in the file), written as a tiled GeoTIFF in EPSG:4326."""
    from matplotlib import cbook

    d = cbook.get_sample_data("jacksboro_fault_dem.npz")
    elev = d["elevation"].astype("float32")
    west, north = float(d["xmin"]), float(max(d["ymin"], d["ymax"]))
    path = tmp_path_factory.mktemp("dem") / "jacksboro.tif"
    with rasterio.open(
        path,
        "w",
        driver="GTiff",
        width=elev.shape[1],
        height=elev.shape[0],
        count=1,
        dtype="float32",
        crs="EPSG:4326",
        transform=from_origin(west, north, float(d["dx"]), float(d["dy"])),
        tiled=True,
        blockxsize=64,
        blockysize=64,
        compress="deflate",
        nodata=-32768,
    ) as ds:
        ds.write(elev, 1)
    return path, elev


def test_cell_centres_equal_rasterio_reading(jacksboro_tif):
    """At cell centres bilinear equals the cell: compare with rasterio's own `sample`."""
    path, elev = jacksboro_tif
    rng = np.random.default_rng(1)
    with rasterio.open(path) as ds:
        rows = rng.integers(0, ds.height, 500)
        cols = rng.integers(0, ds.width, 500)
        xs, ys = rasterio.transform.xy(ds.transform, rows, cols, offset="center")
        got = terrain.sample_dem(ds, xs, ys)
        ref = np.array([v[0] for v in ds.sample(zip(xs, ys, strict=True))], dtype=float)
    np.testing.assert_allclose(got.value, ref, atol=1e-3)
    assert set(got.status) == {"ok"}


def test_bilinear_matches_scipy_regular_grid_interpolator(jacksboro_tif):
    """Independent computation: scipy.interpolate.RegularGridInterpolator(method='linear')
    on the cell-centre grid (points kept half a cell inside the edge)."""
    from scipy.interpolate import RegularGridInterpolator

    path, elev = jacksboro_tif
    rng = np.random.default_rng(2)
    with rasterio.open(path) as ds:
        t = ds.transform
        cx = t.c + (np.arange(ds.width) + 0.5) * t.a
        cy = t.f + (np.arange(ds.height) + 0.5) * t.e
        xs = rng.uniform(cx[0], cx[-1], 3000)
        ys = rng.uniform(cy[-1], cy[0], 3000)
        got = terrain.sample_dem(ds, xs, ys)
        blocks = got.blocks_read
        n_blocks = int(np.ceil(ds.height / 64) * np.ceil(ds.width / 64))
    interp = RegularGridInterpolator((cy[::-1], cx), elev[::-1].astype(float), method="linear")
    ref = interp(np.column_stack([ys, xs]))
    np.testing.assert_allclose(got.value, ref, rtol=0, atol=1e-6 * np.abs(ref).max())
    assert blocks <= n_blocks


def test_only_blocks_with_points_are_read(jacksboro_tif):
    path, _ = jacksboro_tif
    with rasterio.open(path) as ds:
        x, y = rasterio.transform.xy(ds.transform, [10, 11, 12], [10, 12, 14])
        res = terrain.sample_dem(ds, x, y)
    assert res.blocks_read == 1


def _small_dem(tmp_path, nodata_cell=None, crs="EPSG:32608"):
    arr = np.arange(100, dtype="float32").reshape(10, 10)
    if nodata_cell:
        arr[nodata_cell] = -9999
    path = tmp_path / "small.tif"
    with rasterio.open(
        path,
        "w",
        driver="GTiff",
        width=10,
        height=10,
        count=1,
        dtype="float32",
        crs=crs,
        transform=from_origin(0, 1000, 100, 100),
        nodata=-9999,
    ) as ds:
        ds.write(arr, 1)
    return path


def test_outside_nodata_and_bad_coordinates_are_flagged(tmp_path):
    path = _small_dem(tmp_path, nodata_cell=(5, 5))
    with rasterio.open(path) as ds:
        res = terrain.sample_dem(
            ds,
            [550.0, 2000.0, np.nan, 250.0, 560.0],
            [450.0, 500.0, 500.0, 750.0, 420.0],
        )
    assert list(res.status) == [
        "dem_nodata",
        "outside_dem",
        "bad_coordinate",
        "ok",
        "partial_nodata",
    ]
    assert np.isnan(res.value[:3]).all()
    # cell (2, 2) has value 22 at its centre (250, 750)
    assert res.value[3] == pytest.approx(22.0)
    assert np.isfinite(res.value[4])


def test_edge_points_clamp_to_edge_cells(tmp_path):
    path = _small_dem(tmp_path)
    with rasterio.open(path) as ds:
        res = terrain.sample_dem(ds, [1.0, 999.0], [999.0, 1.0])
    # top-left corner → cell (0,0)=0; bottom-right → cell (9,9)=99
    np.testing.assert_allclose(res.value, [0.0, 99.0])


def test_empty_input(tmp_path):
    path = _small_dem(tmp_path)
    with rasterio.open(path) as ds:
        res = terrain.sample_dem(ds, [], [])
    assert res.value.shape == (0,) and res.blocks_read == 0


def test_transform_points_lonlat_to_utm_matches_pyproj_reference():
    """Reference: a point on the central meridian of UTM zone 8 (135 W) at the equator has
    easting 500 000 m, northing 0 m (definition of the UTM false easting)."""
    x, y = terrain.transform_points([-135.0], [0.0], "EPSG:4326", "EPSG:32608")
    assert x[0] == pytest.approx(500000.0, abs=1e-6)
    assert y[0] == pytest.approx(0.0, abs=1e-6)
