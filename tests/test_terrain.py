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


# ----------------------------------------------------------------------------- block scheduling
def _tiled_dem(tmp_path, arr, *, block=16, nodata=-9999.0, name="tiled.tif", mask=None):
    """A tiled GeoTIFF (EPSG:32608, 10 m cells) holding ``arr``; optional internal mask."""
    path = tmp_path / name
    with rasterio.open(
        path,
        "w",
        driver="GTiff",
        width=arr.shape[1],
        height=arr.shape[0],
        count=1,
        dtype=arr.dtype,
        crs="EPSG:32608",
        transform=from_origin(1000.0, 9000.0, 10.0, 10.0),
        tiled=True,
        blockxsize=block,
        blockysize=block,
        compress="deflate",
        nodata=nodata,
    ) as ds:
        ds.write(arr, 1)
        if mask is not None:
            ds.write_mask(mask)
    return path


def _scipy_reference(ds, arr, xs, ys):
    """scipy.interpolate.RegularGridInterpolator(method='linear') on the cell-centre grid."""
    from scipy.interpolate import RegularGridInterpolator

    t = ds.transform
    cx = t.c + (np.arange(ds.width) + 0.5) * t.a
    cy = t.f + (np.arange(ds.height) + 0.5) * t.e
    interp = RegularGridInterpolator((cy[::-1], cx), arr[::-1].astype(float), method="linear")
    return interp(np.column_stack([ys, xs]))


@pytest.fixture(scope="module")
def rough_dem(tmp_path_factory):
    """50 × 70 cells in 16 × 16 blocks (partial blocks at the right and bottom edges)."""
    rng = np.random.default_rng(5)
    arr = rng.normal(1500.0, 400.0, (50, 70)).astype("float32")
    return _tiled_dem(tmp_path_factory.mktemp("rough"), arr), arr


def test_stencils_across_block_edges_match_scipy(rough_dem):
    """Points whose 2 × 2 stencil straddles a block edge or corner (cell centres 15 | 16 and
    31 | 32 in both directions) take the neighbour block's cells: compared with scipy's
    RegularGridInterpolator on the whole grid."""
    path, arr = rough_dem
    with rasterio.open(path) as ds:
        t = ds.transform
        # fractional cell-centre coordinates between cells 15/16 and 31/32, and at 47.5
        frac = np.array([15.25, 15.5, 15.99, 31.01, 31.5, 47.5])
        rr, cc = np.meshgrid(frac, frac)
        xs = t.c + (cc.ravel() + 0.5) * t.a
        ys = t.f + (rr.ravel() + 0.5) * t.e
        got = terrain.sample_dem(ds, xs, ys)
        ref = _scipy_reference(ds, arr, xs, ys)
    np.testing.assert_allclose(got.value, ref, rtol=0, atol=1e-9 * np.abs(ref).max())
    assert set(got.status) == {"ok"}


def test_each_touched_block_is_decoded_once(rough_dem):
    """blocks_read equals the number of distinct blocks holding a stencil cell (counted here
    independently); a stencil on a block corner touches four blocks."""
    path, _ = rough_dem
    with rasterio.open(path) as ds:
        t = ds.transform
        # stencil upper-left cell (15, 15): cells (15..16, 15..16) lie in four 16-cell blocks
        corner = terrain.sample_dem(ds, [t.c + 16.0 * t.a], [t.f + 16.0 * t.e])
        rng = np.random.default_rng(8)
        xs = rng.uniform(ds.bounds.left, ds.bounds.right, 400)
        ys = rng.uniform(ds.bounds.bottom, ds.bounds.top, 400)
        many = terrain.sample_dem(ds, xs, ys)
        rc = np.clip((ys - t.f) / t.e - 0.5, 0, ds.height - 1)
        cc = np.clip((xs - t.c) / t.a - 0.5, 0, ds.width - 1)
        r0 = np.clip(np.floor(rc).astype(int), 0, ds.height - 2)
        c0 = np.clip(np.floor(cc).astype(int), 0, ds.width - 2)
        cells = {
            (r // 16, c // 16)
            for dr in (0, 1)
            for dc in (0, 1)
            for r, c in zip(r0 + dr, c0 + dc, strict=True)
        }
    assert corner.blocks_read == 4
    assert many.blocks_read == len(cells)


@pytest.mark.parametrize("workers", [1, 2, 3])
def test_results_do_not_depend_on_worker_threads(rough_dem, workers):
    """Consistency check (regression-type): parallel block decoding must give bit-identical
    values and statuses to reading through the caller's dataset alone."""
    path, _ = rough_dem
    rng = np.random.default_rng(9)
    with rasterio.open(path) as ds:
        b = ds.bounds
        xs = rng.uniform(b.left - 20, b.right + 20, 5000)
        ys = rng.uniform(b.bottom - 20, b.top + 20, 5000)
        ref = terrain.sample_dem(ds, xs, ys, workers=0)
        got = terrain.sample_dem(ds, xs, ys, workers=workers)
    np.testing.assert_array_equal(got.value, ref.value)
    np.testing.assert_array_equal(got.status, ref.status)
    assert got.blocks_read == ref.blocks_read


def test_sparse_grouping_equals_dense_grouping(rough_dem, monkeypatch):
    """Consistency check (regression-type): grouping points by sorting their block ids (used
    for mosaics with many more blocks than points) gives what dense counting gives."""
    path, _ = rough_dem
    rng = np.random.default_rng(13)
    with rasterio.open(path) as ds:
        b = ds.bounds
        xs, ys = rng.uniform(b.left, b.right, 300), rng.uniform(b.bottom, b.top, 300)
        dense = terrain.sample_dem(ds, xs, ys)
        monkeypatch.setattr(terrain, "_DENSE_BLOCKS_PER_POINT", 0)
        monkeypatch.setattr(terrain, "_DENSE_MIN_BLOCKS", 0)
        sparse = terrain.sample_dem(ds, xs, ys)
    np.testing.assert_array_equal(sparse.value, dense.value)
    np.testing.assert_array_equal(sparse.status, dense.status)
    assert sparse.blocks_read == dense.blocks_read


def test_falls_back_when_the_dataset_cannot_be_reopened(rough_dem, monkeypatch):
    """A dataset that cannot be reopened by name is read through the caller's handle only."""
    path, arr = rough_dem
    with rasterio.open(path) as ds:
        xs, ys = rasterio.transform.xy(ds.transform, [3, 40], [5, 60], offset="center")

        def refuse(*args, **kwargs):
            raise rasterio.errors.RasterioIOError("not reopenable")

        monkeypatch.setattr(terrain.rasterio, "open", refuse)
        got = terrain.sample_dem(ds, xs, ys, workers=2)
    np.testing.assert_allclose(got.value, [arr[3, 5], arr[40, 60]])


def test_a_failing_worker_read_falls_back_to_the_callers_dataset(rough_dem, monkeypatch):
    """If a read on a private handle fails (e.g. a worker thread lacks the caller's GDAL
    options), the remaining blocks are read through the caller's dataset: same results."""
    path, _ = rough_dem
    rng = np.random.default_rng(12)
    with rasterio.open(path) as ds:
        b = ds.bounds
        xs, ys = rng.uniform(b.left, b.right, 3000), rng.uniform(b.bottom, b.top, 3000)
        ref = terrain.sample_dem(ds, xs, ys, workers=0)

        def fail(self, win, out):
            raise RuntimeError("no credentials in this thread")

        monkeypatch.setattr(terrain._BlockReader, "_task", fail)
        got = terrain.sample_dem(ds, xs, ys, workers=2)
    np.testing.assert_array_equal(got.value, ref.value)
    assert got.blocks_read == ref.blocks_read


def test_vrt_mosaic_equals_the_single_file(tmp_path, rough_dem):
    """A VRT mosaic of two tiles (GDAL's VRT driver assembles it) samples like the GeoTIFF
    holding the same cells, including across the tile seam."""
    path, arr = rough_dem
    left, right = arr[:, :32], arr[:, 32:]
    t0 = _tiled_dem(tmp_path, np.ascontiguousarray(left), name="left.tif")
    with rasterio.open(
        tmp_path / "right.tif",
        "w",
        driver="GTiff",
        width=right.shape[1],
        height=50,
        count=1,
        dtype="float32",
        crs="EPSG:32608",
        transform=from_origin(1320.0, 9000.0, 10.0, 10.0),
        tiled=True,
        blockxsize=16,
        blockysize=16,
        nodata=-9999.0,
    ) as dst:
        dst.write(np.ascontiguousarray(right), 1)
    sources = "".join(
        f'<ComplexSource><SourceFilename relativeToVRT="1">{name}</SourceFilename>'
        f'<SourceBand>1</SourceBand><SrcRect xOff="0" yOff="0" xSize="{w}" ySize="50"/>'
        f'<DstRect xOff="{off}" yOff="0" xSize="{w}" ySize="50"/><NODATA>-9999</NODATA>'
        "</ComplexSource>"
        for name, off, w in ((t0.name, 0, 32), ("right.tif", 32, 38))
    )
    vrt = tmp_path / "mosaic.vrt"
    vrt.write_text(
        '<VRTDataset rasterXSize="70" rasterYSize="50"><SRS>EPSG:32608</SRS>'
        "<GeoTransform>1000, 10, 0, 9000, 0, -10</GeoTransform>"
        '<VRTRasterBand dataType="Float32" band="1" blockXSize="16" blockYSize="16">'
        f"<NoDataValue>-9999</NoDataValue>{sources}</VRTRasterBand></VRTDataset>"
    )
    rng = np.random.default_rng(10)
    with rasterio.open(path) as ds:
        b = ds.bounds
        xs = np.r_[rng.uniform(b.left, b.right, 2000), 1000.0 + 31.7 * 10.0]
        ys = np.r_[rng.uniform(b.bottom, b.top, 2000), 9000.0 - 20.2 * 10.0]
        ref = terrain.sample_dem(ds, xs, ys)
    with rasterio.open(vrt) as ds:
        got = terrain.sample_dem(ds, xs, ys)
    np.testing.assert_array_equal(got.value, ref.value)
    np.testing.assert_array_equal(got.status, ref.status)


def test_integer_dem_with_nodata(tmp_path):
    """An int16 DEM (nodata −32768, as SRTM tiles ship): cell centres equal rasterio's own
    `sample`; the nodata cell is reported as such."""
    rng = np.random.default_rng(11)
    arr = rng.integers(-50, 4000, (40, 40)).astype("int16")
    arr[20, 20] = -32768
    path = _tiled_dem(tmp_path, arr, nodata=-32768)
    with rasterio.open(path) as ds:
        rows = np.r_[rng.integers(0, 40, 300), 20]
        cols = np.r_[rng.integers(0, 40, 300), 20]
        xs, ys = rasterio.transform.xy(ds.transform, rows, cols, offset="center")
        got = terrain.sample_dem(ds, xs, ys)
        ref = np.array([v[0] for v in ds.sample(zip(xs, ys, strict=True))], dtype=float)
    ok = ref != -32768
    np.testing.assert_allclose(got.value[ok], ref[ok])
    assert got.status[-1] == "dem_nodata" and np.isnan(got.value[-1])


def test_internal_mask_is_honoured(tmp_path):
    """Cells masked by an internal (per-dataset) mask are nodata, as rasterio's
    `read(masked=True)` reports them."""
    arr = np.arange(32 * 32, dtype="float32").reshape(32, 32)
    mask = np.full((32, 32), 255, dtype="uint8")
    mask[10, 10] = 0
    path = _tiled_dem(tmp_path, arr, nodata=None, mask=mask)
    with rasterio.open(path) as ds:
        assert ds.read(1, masked=True).mask[10, 10]  # the reference says masked
        xs, ys = rasterio.transform.xy(ds.transform, [10, 5], [10, 5], offset="center")
        got = terrain.sample_dem(ds, xs, ys)
    assert list(got.status) == ["dem_nodata", "ok"]
    assert got.value[1] == pytest.approx(arr[5, 5])


def test_mismatched_lengths_and_negative_workers_raise(tmp_path):
    path = _small_dem(tmp_path)
    with rasterio.open(path) as ds:
        with pytest.raises(terrain.SamplingError, match="differ in length"):
            terrain.sample_dem(ds, [1.0, 2.0], [1.0])
        with pytest.raises(ValueError, match="workers"):
            terrain.sample_dem(ds, [1.0], [1.0], workers=-1)
