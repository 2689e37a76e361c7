"""Station elevation from a DEM: block-wise bilinear sampling.

The DEM is never read whole: points are grouped by the raster block that holds them and only
those blocks (plus a one-cell margin for the interpolation stencil) are read. Works on any
dataset rasterio opens (GeoTIFF, VRT mosaics). The dataset is passed in already open; this
module never opens files.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import rasterio
from numpy.typing import ArrayLike
from pyproj import CRS, Transformer
from rasterio.windows import Window

__all__ = [
    "SampleResult",
    "STATUS_OK",
    "STATUS_OUTSIDE",
    "STATUS_NODATA",
    "STATUS_PARTIAL",
    "STATUS_BAD_COORD",
    "bilinear_sample",
    "sample_dem",
    "transform_points",
]

STATUS_OK = "ok"
STATUS_OUTSIDE = "outside_dem"
STATUS_NODATA = "dem_nodata"
#: Some but not all of the four stencil cells are nodata: value from the valid ones.
STATUS_PARTIAL = "partial_nodata"
STATUS_BAD_COORD = "bad_coordinate"


@dataclass(frozen=True)
class SampleResult:
    """Elevations and a status per point.

    Attributes
    ----------
    value : ndarray of float
        Sampled value in the DEM's units [m for an elevation model]; NaN where not available.
    status : ndarray of str
        One of ``ok``, ``partial_nodata``, ``dem_nodata``, ``outside_dem``, ``bad_coordinate``.
    blocks_read : int
        Number of raster windows read (one per raster block that holds at least one point).
    """

    value: np.ndarray
    status: np.ndarray
    blocks_read: int


def transform_points(
    x: ArrayLike, y: ArrayLike, src_crs: CRS | str, dst_crs: CRS | str
) -> tuple[np.ndarray, np.ndarray]:
    """Transform coordinates between CRSs with pyproj (``always_xy`` axis order: x/lon first)."""
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    src, dst = CRS.from_user_input(src_crs), CRS.from_user_input(dst_crs)
    if src == dst:
        return x.copy(), y.copy()
    t = Transformer.from_crs(src, dst, always_xy=True)
    with np.errstate(invalid="ignore"):
        xx, yy = t.transform(x, y, errcheck=False)
    xx = np.asarray(xx, dtype=float)
    yy = np.asarray(yy, dtype=float)
    bad = ~np.isfinite(xx) | ~np.isfinite(yy)
    xx[bad] = np.nan
    yy[bad] = np.nan
    return xx, yy


def bilinear_sample(
    grid: np.ndarray, valid: np.ndarray, row: np.ndarray, col: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Bilinear interpolation on a grid at fractional cell-centre coordinates.

    Parameters
    ----------
    grid : 2-D array
        Values; cell (i, j) has its centre at fractional coordinate (i, j).
    valid : 2-D bool array
        False where the cell is nodata.
    row, col : 1-D arrays
        Fractional coordinates in the grid's cell-centre frame; must lie within
        [0, nrows−1] × [0, ncols−1] (the caller clamps at the raster edge).

    Returns
    -------
    (value, incomplete) : value NaN where every stencil cell with weight > 0 is nodata;
    ``incomplete`` is True where at least one cell with weight > 0 is nodata.

    Notes
    -----
    v = Σ w_k v_k / Σ w_k over the valid stencil cells, w = (1−dr)(1−dc), (1−dr)dc, dr(1−dc),
    dr·dc — the standard bilinear weights (e.g. Press et al., Numerical Recipes, §3.6),
    renormalised over valid cells where the stencil touches nodata.
    """
    nr, nc = grid.shape
    r0 = np.clip(np.floor(row).astype(np.int64), 0, max(nr - 2, 0))
    c0 = np.clip(np.floor(col).astype(np.int64), 0, max(nc - 2, 0))
    r1 = np.minimum(r0 + 1, nr - 1)
    c1 = np.minimum(c0 + 1, nc - 1)
    dr = np.clip(row - r0, 0.0, 1.0)
    dc = np.clip(col - c0, 0.0, 1.0)
    num = np.zeros(row.shape, dtype=float)
    den = np.zeros(row.shape, dtype=float)
    missing = np.zeros(row.shape, dtype=bool)
    for rr, cc, w in (
        (r0, c0, (1 - dr) * (1 - dc)),
        (r0, c1, (1 - dr) * dc),
        (r1, c0, dr * (1 - dc)),
        (r1, c1, dr * dc),
    ):
        ok = valid[rr, cc]
        num += np.where(ok, grid[rr, cc] * w, 0.0)
        den += np.where(ok, w, 0.0)
        missing |= ~ok & (w > 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        value = np.where(den > 0, num / den, np.nan)
    return value, missing


def sample_dem(
    ds: rasterio.io.DatasetReader,
    x: ArrayLike,
    y: ArrayLike,
    *,
    band: int = 1,
) -> SampleResult:
    """Bilinear DEM values at points given in the dataset's own CRS, read block by block.

    Parameters
    ----------
    ds : open rasterio dataset (GeoTIFF, VRT, …) with a north-up transform.
    x, y : array_like
        Point coordinates in ``ds.crs`` [CRS units]; NaN coordinates get ``bad_coordinate``.
    band : int
        Band to read.

    Returns
    -------
    SampleResult
        Values in the raster's units, a status per point, and the number of windows read.

    Notes
    -----
    Cell centres follow GDAL's convention: cell (i, j) covers [j, j+1) × [i, i+1) in pixel
    space and its centre is at (i+0.5, j+0.5). A point within half a cell of the raster edge
    is clamped onto the edge cells' centres (constant extrapolation across the half cell).
    Only windows of blocks that hold points are read, each with a one-cell margin for the
    stencil; the caller's memory stays bounded by the block size, not the raster size.
    """
    x = np.asarray(x, dtype=float).ravel()
    y = np.asarray(y, dtype=float).ravel()
    n = x.size
    value = np.full(n, np.nan)
    status = np.full(n, STATUS_BAD_COORD, dtype=object)
    if n == 0:
        return SampleResult(value, status.astype(str), 0)
    t = ds.transform
    if t.b != 0 or t.d != 0:
        raise ValueError("sample_dem needs a north-up raster (no rotation terms in the transform)")
    finite = np.isfinite(x) & np.isfinite(y)
    colf = np.full(n, np.nan)
    rowf = np.full(n, np.nan)
    colf[finite] = (x[finite] - t.c) / t.a
    rowf[finite] = (y[finite] - t.f) / t.e
    h, w = ds.height, ds.width
    inside = finite & (colf >= 0) & (colf <= w) & (rowf >= 0) & (rowf <= h)
    status[finite & ~inside] = STATUS_OUTSIDE
    # Cell-centre frame, clamped at the edges.
    rc = np.clip(rowf - 0.5, 0.0, h - 1.0)
    ccf = np.clip(colf - 0.5, 0.0, w - 1.0)
    bh, bw = ds.block_shapes[band - 1]
    idx = np.flatnonzero(inside)
    brow = (np.floor(rc[idx]).astype(np.int64)) // bh
    bcol = (np.floor(ccf[idx]).astype(np.int64)) // bw
    key = brow * (w // bw + 2) + bcol
    order = np.argsort(key, kind="stable")
    idx, key, brow, bcol = idx[order], key[order], brow[order], bcol[order]
    starts = np.flatnonzero(np.r_[True, key[1:] != key[:-1]])
    ends = np.r_[starts[1:], key.size]
    nodata = ds.nodatavals[band - 1]
    blocks = 0
    for s, e in zip(starts, ends, strict=True):
        r_off = int(brow[s] * bh)
        c_off = int(bcol[s] * bw)
        win = Window(c_off, r_off, min(bw + 1, w - c_off), min(bh + 1, h - r_off))
        data = ds.read(band, window=win, masked=True)
        blocks += 1
        grid = np.asarray(data.filled(np.nan), dtype=float)
        valid = ~np.ma.getmaskarray(data) & np.isfinite(grid)
        if nodata is not None and np.isfinite(nodata):
            valid &= grid != nodata
        pts = idx[s:e]
        v, incomplete = bilinear_sample(grid, valid, rc[pts] - r_off, ccf[pts] - c_off)
        value[pts] = v
        status[pts] = np.where(
            np.isnan(v), STATUS_NODATA, np.where(incomplete, STATUS_PARTIAL, STATUS_OK)
        )
    return SampleResult(value, status.astype(str), blocks)
