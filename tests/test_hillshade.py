"""Tests of pipeline.hillshade against closed forms, a reference library and pyproj."""

from __future__ import annotations

import io
import math
import warnings

import numpy as np
import pytest
import rasterio
from matplotlib.colors import LightSource
from PIL import Image
from pyproj import Transformer
from rasterio.io import MemoryFile
from rasterio.transform import from_origin

from pipeline.errors import InputFileError
from pipeline.hillshade import Basemap, basemap_from_dataset, hillshade


def plane(a: float, b: float, rows: int, cols: int, cell_x: float, cell_y: float) -> np.ndarray:
    """z = a*x + b*y [m] with x east, y north; row 0 is the north edge."""
    r, c = np.mgrid[0:rows, 0:cols]
    return 1000.0 + a * c * cell_x + b * (-r * cell_y)


def illumination_closed_form(a, b, azimuth_deg, altitude_deg, z_factor=1.0):
    """Standard illumination model, cos(Z)cos(S) + sin(Z)sin(S)cos(az - aspect)
    (Burrough & McDonnell 1998), with slope and aspect of the plane z = a x + b y taken
    analytically (aspect = downslope direction, clockwise from north)."""
    slope = math.atan(z_factor * math.hypot(a, b))
    aspect = math.atan2(-a, -b)
    zen = math.radians(90.0 - altitude_deg)
    az = math.radians(azimuth_deg)
    return math.cos(zen) * math.cos(slope) + math.sin(zen) * math.sin(slope) * math.cos(az - aspect)


def illumination_normal_dot_sun(a, b, azimuth_deg, altitude_deg, z_factor=1.0):
    """Independent route: Lambert's cosine = unit surface normal . unit vector to the sun."""
    n = np.array([-z_factor * a, -z_factor * b, 1.0])
    n /= np.linalg.norm(n)
    az, alt = math.radians(azimuth_deg), math.radians(altitude_deg)
    s = np.array([math.sin(az) * math.cos(alt), math.cos(az) * math.cos(alt), math.sin(alt)])
    return float(n @ s)


PLANES = [
    # (dz/dx, dz/dy, azimuth, altitude, z_factor, cell_x, cell_y)
    (0.3, -0.2, 315.0, 45.0, 1.0, 30.0, 20.0),
    (-0.5, 0.1, 315.0, 45.0, 1.0, 90.0, 90.0),
    (0.0, 0.8, 180.0, 30.0, 1.0, 10.0, 10.0),
    (0.25, 0.25, 45.0, 60.0, 2.0, 25.0, 50.0),
    (-1.2, -0.7, 270.0, 20.0, 0.5, 5.0, 5.0),
]


@pytest.mark.parametrize("a,b,az,alt,zf,cx,cy", PLANES)
def test_plane_matches_standard_illumination_model(a, b, az, alt, zf, cx, cy):
    # Reference: closed form of the standard illumination model (Burrough & McDonnell 1998)
    # and, independently, the normal . sun dot product. Horn's operator is exact on a plane.
    z = plane(a, b, 7, 9, cx, cy)
    hs = hillshade(z, cx, cy, azimuth_deg=az, altitude_deg=alt, z_factor=zf)
    expected = max(0.0, illumination_closed_form(a, b, az, alt, zf))
    assert expected == pytest.approx(max(0.0, illumination_normal_dot_sun(a, b, az, alt, zf)))
    np.testing.assert_allclose(hs[1:-1, 1:-1], expected, atol=1e-12)


@pytest.mark.parametrize("a,b,az,alt,zf,cx,cy", PLANES)
def test_plane_matches_matplotlib_lightsource(a, b, az, alt, zf, cx, cy):
    # Reference library: matplotlib.colors.LightSource.hillshade (central differences; exact
    # on a plane, where its contrast stretch does not apply because the result is constant).
    z = plane(a, b, 7, 9, cx, cy)
    ref = LightSource(azdeg=az, altdeg=alt).hillshade(z, vert_exag=zf, dx=cx, dy=cy)
    hs = hillshade(z, cx, cy, azimuth_deg=az, altitude_deg=alt, z_factor=zf)
    np.testing.assert_allclose(hs[1:-1, 1:-1], ref[1:-1, 1:-1], atol=1e-9)


@pytest.mark.parametrize("altitude", [10.0, 30.0, 45.0, 75.0, 90.0])
def test_flat_terrain_gives_cos_zenith(altitude):
    # Standard illumination model with slope 0: I = cos(zenith) (Burrough & McDonnell 1998).
    hs = hillshade(np.full((5, 6), 1234.0), 30.0, 30.0, altitude_deg=altitude)
    np.testing.assert_allclose(hs, math.cos(math.radians(90.0 - altitude)), atol=1e-12)


def test_slope_facing_away_from_light_is_clipped_to_zero():
    # A steep slope facing south-east (away from a low north-west sun) is in shadow: I < 0 by
    # the closed form, clipped to 0.
    a, b = -3.0, 3.0  # rises towards the north-west, so it faces south-east
    assert illumination_closed_form(a, b, 315.0, 10.0) < 0
    hs = hillshade(plane(a, b, 5, 5, 10.0, 10.0), 10.0, 10.0, altitude_deg=10.0)
    np.testing.assert_array_equal(hs[1:-1, 1:-1], 0.0)


def test_esri_worked_example():
    # Worked example of the ArcGIS "How Hillshade works" help page (Horn slope/aspect, 5 m
    # cells, sun 315 deg / 45 deg): result 154 on the 0-255 scale. From memory.
    window = np.array([[2450, 2461, 2483], [2452, 2461, 2483], [2447, 2455, 2477]], float)
    value = 255.0 * hillshade(window, 5.0, 5.0)[1, 1]
    assert round(value) == 154


def test_nan_centre_stays_nan_and_neighbours_stay_finite():
    z = plane(0.2, 0.1, 9, 9, 30.0, 30.0)
    z[4, 4] = np.nan
    hs = hillshade(z, 30.0, 30.0)
    assert np.isnan(hs[4, 4])
    assert np.isnan(hs).sum() == 1
    assert np.all((hs[np.isfinite(hs)] >= 0) & (hs[np.isfinite(hs)] <= 1))
    # Far from the hole the plane value is untouched.
    assert hs[1, 1] == pytest.approx(illumination_closed_form(0.2, 0.1, 315.0, 45.0), abs=1e-12)


def test_all_nan_and_empty_inputs():
    assert np.isnan(hillshade(np.full((3, 4), np.nan), 1.0, 1.0)).all()
    assert hillshade(np.empty((0, 0)), 1.0, 1.0).shape == (0, 0)


def test_random_terrain_in_unit_interval_and_same_shape():
    z = np.random.default_rng(3).normal(0, 200, (40, 30)).cumsum(axis=0)
    hs = hillshade(z, 90.0, 90.0)
    assert hs.shape == z.shape
    assert np.all((hs >= 0) & (hs <= 1))


@pytest.mark.parametrize(
    "args", [(np.zeros(5), 1.0, 1.0), (np.zeros((3, 3)), 0.0, 1.0), (np.zeros((3, 3)), 1.0, -2.0)]
)
def test_bad_input_raises_value_error(args):
    with pytest.raises(ValueError):
        hillshade(*args)


# ----------------------------------------------------------------------------- basemap ---

# Demo region of SCHEMA.md: EPSG:32608, upper-left x=300000, y=4500000.
UTM = "EPSG:32608"


def _dem(width=60, height=50, cell=3000.0, crs=UTM, origin=(300000.0, 4500000.0), hole=False):
    """A small DEM in memory: ridge rising to the north plus a bump; optional nodata hole."""
    r, c = np.mgrid[0:height, 0:width]
    z = 500.0 + 40.0 * (height - r) + 600.0 * np.exp(-((c - width / 2) ** 2) / 60.0)
    z = z.astype("float32")
    if hole:
        z[20:30, 25:35] = -9999.0
    mf = MemoryFile()
    with mf.open(
        driver="GTiff",
        width=width,
        height=height,
        count=1,
        dtype="float32",
        crs=crs,
        transform=from_origin(origin[0], origin[1], cell, cell),
        nodata=-9999.0,
    ) as ds:
        ds.write(z, 1)
    return mf


@pytest.fixture()
def utm_dem():
    mf = _dem()
    with mf.open() as ds:
        yield ds
    mf.close()


def _png(bm: Basemap) -> np.ndarray:
    im = Image.open(io.BytesIO(bm.png_bytes))
    assert im.format == "PNG" and im.mode == "RGBA"
    return np.asarray(im)


def test_basemap_bounds_match_pyproj_transform_of_dataset(utm_dem):
    bm = basemap_from_dataset(utm_dem, max_pixels=40)
    (south, west), (north, east) = bm.bounds_latlon
    img = _png(bm)
    px_lat = (north - south) / img.shape[0]
    px_lon = (east - west) / img.shape[1]
    # Reference: pyproj transforms of the dataset's corners and its densified outline.
    tr = Transformer.from_crs(UTM, "EPSG:4326", always_xy=True)
    left, bottom, right, top = utm_dem.bounds
    lons, lats = tr.transform([left, left, right, right], [bottom, top, bottom, top])
    for lon, lat in zip(lons, lats, strict=True):
        assert south - 1e-9 <= lat <= north + 1e-9
        assert west - 1e-9 <= lon <= east + 1e-9
    w_ref, s_ref, e_ref, n_ref = tr.transform_bounds(left, bottom, right, top, densify_pts=101)
    assert south == pytest.approx(s_ref, abs=1.5 * px_lat)
    assert north == pytest.approx(n_ref, abs=1.5 * px_lat)
    assert west == pytest.approx(w_ref, abs=1.5 * px_lon)
    assert east == pytest.approx(e_ref, abs=1.5 * px_lon)


class _RecordingDataset:
    """Wraps a dataset and records the keyword arguments of every read()."""

    def __init__(self, ds):
        self._ds = ds
        self.reads = []

    def read(self, *args, **kwargs):
        self.reads.append(kwargs)
        return self._ds.read(*args, **kwargs)

    def __getattr__(self, name):
        return getattr(self._ds, name)


def test_basemap_reads_decimated_never_full_resolution(utm_dem):
    rec = _RecordingDataset(utm_dem)
    bm = basemap_from_dataset(rec, max_pixels=20)
    assert len(rec.reads) == 1
    out_h, out_w = rec.reads[0]["out_shape"]
    assert max(out_h, out_w) == 20 and (out_h, out_w) != (utm_dem.height, utm_dem.width)
    img = _png(bm)
    assert max(img.shape[:2]) <= 30  # warped image stays near the decimated size


def test_basemap_transparent_outside_footprint_and_opaque_inside(utm_dem):
    img = _png(basemap_from_dataset(utm_dem, max_pixels=60))
    h, w = img.shape[:2]
    assert img[h // 2, w // 2, 3] == 255
    # The UTM rectangle is rotated in Web Mercator (grid convergence), so at least one corner
    # of the bounding image lies outside the data.
    corners = [img[0, 0, 3], img[0, -1, 3], img[-1, 0, 3], img[-1, -1, 3]]
    assert min(corners) == 0


def test_basemap_nodata_hole_is_transparent():
    mf = _dem(hole=True)
    with mf.open() as ds:
        bm = basemap_from_dataset(ds, max_pixels=60)
        # Centre of the hole: column 30, row 25 of the DEM -> lon/lat -> image pixel.
        x, y = ds.xy(25, 30)
    mf.close()
    lon, lat = Transformer.from_crs(UTM, "EPSG:4326", always_xy=True).transform(x, y)
    img = _png(bm)
    (south, west), (north, east) = bm.bounds_latlon
    merc = Transformer.from_crs("EPSG:4326", "EPSG:3857", always_xy=True)
    mx, my = merc.transform(lon, lat)
    mw, ms = merc.transform(west, south)
    me, mn = merc.transform(east, north)
    col = int((mx - mw) / (me - mw) * img.shape[1])
    row = int((mn - my) / (mn - ms) * img.shape[0])
    assert img[row, col, 3] == 0
    assert img[img.shape[0] // 8 + 2, img.shape[1] // 2, 3] == 255


def test_basemap_north_is_up_and_high_ground_lighter(utm_dem):
    # The DEM rises to the north and the tint lightens with elevation, so the top of the
    # picture must be lighter than the bottom (orientation check, not a colour regression).
    img = _png(basemap_from_dataset(utm_dem, max_pixels=60)).astype(float)
    opaque = img[..., 3] == 255
    lum = img[..., :3].mean(axis=-1)
    h = img.shape[0]
    top = lum[: h // 4][opaque[: h // 4]].mean()
    bottom = lum[-h // 4 :][opaque[-h // 4 :]].mean()
    assert top > bottom + 5


def test_basemap_is_deterministic(utm_dem):
    a = basemap_from_dataset(utm_dem, max_pixels=30)
    b = basemap_from_dataset(utm_dem, max_pixels=30)
    assert a == b


def test_basemap_geographic_dem_bounds_are_its_own_bounds():
    mf = _dem(width=40, height=30, cell=0.01, crs="EPSG:4326", origin=(-137.4, 40.6))
    with mf.open() as ds:
        bm = basemap_from_dataset(ds, max_pixels=40)
        left, bottom, right, top = ds.bounds
    mf.close()
    (south, west), (north, east) = bm.bounds_latlon
    assert (west, east) == (pytest.approx(left, abs=0.011), pytest.approx(right, abs=0.011))
    assert (south, north) == (pytest.approx(bottom, abs=0.011), pytest.approx(top, abs=0.011))


def test_basemap_without_crs_raises_input_file_error():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", rasterio.errors.NotGeoreferencedWarning)
        with MemoryFile() as mf:
            with mf.open(driver="GTiff", width=4, height=4, count=1, dtype="float32") as ds:
                ds.write(np.zeros((1, 4, 4), "float32"))
            with mf.open() as ds, pytest.raises(InputFileError, match="no CRS"):
                basemap_from_dataset(ds)
