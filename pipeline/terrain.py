"""Station elevation from a DEM: block-wise bilinear sampling.

The DEM is never read whole: points are grouped by the raster block that holds the upper-left
cell of their interpolation stencil, and only the blocks holding a stencil cell of some point
are decoded — each exactly once, on the raster's natural block boundaries. A stencil that
crosses a block edge takes its missing row/column from the neighbouring block, which is kept
decoded until its last use and then dropped, so memory stays bounded by about one row of
blocks, not by the raster. Works on any dataset rasterio opens (GeoTIFF, VRT mosaics).

The dataset is passed in already open; this module opens no file of its own. To decode blocks
in two threads and to keep GDAL's block cache small, it opens private read-only handles on
*the same dataset* (``ds.name``), reopened every few MB and all closed before
:func:`sample_dem` returns; ``workers=0`` reads through ``ds`` only.
"""

from __future__ import annotations

import os
import queue
from collections.abc import Iterator, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np
import rasterio
from numpy.typing import ArrayLike
from pyproj import CRS, Transformer
from rasterio.enums import MaskFlags
from rasterio.windows import Window

from pipeline.errors import AltigradeError

__all__ = [
    "SampleResult",
    "SamplingError",
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

_STATUS_NAMES = (STATUS_OK, STATUS_PARTIAL, STATUS_NODATA, STATUS_OUTSIDE, STATUS_BAD_COORD)
_OK, _PARTIAL, _NODATA, _OUTSIDE, _BAD = range(len(_STATUS_NAMES))

#: Fewest blocks to decode before worker threads are worth starting (auto mode).
_PARALLEL_MIN_BLOCKS = 8
#: Bytes of blocks read after which a private handle is closed and reopened, dropping the
#: blocks GDAL cached for it: bounds the sampler's memory whatever GDAL_CACHEMAX is, at the
#: cost of one reopen (≈ 1–2 ms) per 4 MB decoded.
_HANDLE_RECYCLE_BYTES = 4 << 20
#: Points per chunk of the final bilinear combination (bounds its temporaries).
_COMBINE_CHUNK = 1 << 14
#: Points are grouped by dense counting over all blocks while the raster has at most this
#: many blocks per point (plus a floor), else by sorting their block ids.
_DENSE_BLOCKS_PER_POINT = 4
_DENSE_MIN_BLOCKS = 4096


class SamplingError(AltigradeError, ValueError):
    """The points or the dataset cannot be sampled as asked (rotated raster, x/y of different
    lengths, a negative worker count)."""


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
        Number of raster blocks decoded (each block holding a stencil cell of at least one
        point, decoded once).
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


def _combine(
    values: Sequence[np.ndarray], valid: Sequence[np.ndarray], dr: np.ndarray, dc: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Bilinear combination of the four stencil values (order 00, 01, 10, 11), renormalised
    over the valid ones; returns (value, incomplete). See :func:`bilinear_sample`."""
    num = np.zeros(dr.shape, dtype=float)
    den = np.zeros(dr.shape, dtype=float)
    missing = np.zeros(dr.shape, dtype=bool)
    weights = ((1 - dr) * (1 - dc), (1 - dr) * dc, dr * (1 - dc), dr * dc)
    for v, ok, w in zip(values, valid, weights, strict=True):
        num += np.where(ok, v, 0.0) * w
        den += np.where(ok, w, 0.0)
        missing |= ~ok & (w > 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        value = np.where(den > 0, num / den, np.nan)
    return value, missing


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
    corners = ((r0, c0), (r0, c1), (r1, c0), (r1, c1))
    return _combine(
        [grid[rr, cc] for rr, cc in corners], [valid[rr, cc] for rr, cc in corners], dr, dc
    )


# ------------------------------------------------------------------------------ block reading
class _BlockReader:
    """Decodes raster blocks in a fixed order and hands them out in that order.

    ``workers == 0``: every block is read through the caller's dataset, in this thread.
    ``workers >= 1``: blocks are read on private read-only handles of the same dataset, by this
    thread and ``workers - 1`` background threads reading a few blocks ahead (this thread
    decodes any block no background thread has started, rather than wait). A private handle is
    reopened after ``_HANDLE_RECYCLE_BYTES`` of blocks so the blocks GDAL caches for it are
    released. Blocks are decoded into reusable buffers that the caller hands back with
    :meth:`release`. If a private handle cannot be opened or a read on one fails, the
    remaining blocks are read through the caller's dataset.
    """

    def __init__(
        self, ds, band: int, windows: list[Window], workers: int, with_mask: bool, dtype
    ) -> None:
        self.ds, self.band, self.windows, self.with_mask = ds, band, windows, with_mask
        self._shape = ds.block_shapes[band - 1]
        self._dtype = dtype
        block_bytes = self._shape[0] * self._shape[1] * np.dtype(dtype).itemsize
        self._recycle_reads = max(4, _HANDLE_RECYCLE_BYTES // max(block_bytes, 1))
        self._free: list[np.ndarray] = []  # reusable full-block buffers (this thread only)
        self._free_masks: list[np.ndarray] = []
        self._handles: queue.SimpleQueue = queue.SimpleQueue()
        self._executor: ThreadPoolExecutor | None = None
        # per window: (future, output buffers), or (None, block) if read by this thread
        self._futures: list[tuple[Future | None, tuple] | None] = []
        self.private = False
        if workers > 0:
            probe = self._open_private()
            if probe is not None:
                self.private = True
                self._handles.put([probe, 0])
                if workers > 1:
                    self._executor = ThreadPoolExecutor(workers - 1, thread_name_prefix="dem-block")
        self._ahead = 2 * workers + 2
        self._submit_until(self._ahead)

    def _buffers(self, win: Window) -> tuple[np.ndarray, np.ndarray | None]:
        """Output arrays for one window: views of pooled full-block buffers."""
        hh, ww = int(win.height), int(win.width)
        data = self._free.pop() if self._free else np.empty(self._shape, dtype=self._dtype)
        mask = None
        if self.with_mask:
            mask = self._free_masks.pop() if self._free_masks else np.empty(self._shape, np.uint8)
            mask = mask[:hh, :ww]
        return data[:hh, :ww], mask

    def release(self, block: tuple[np.ndarray, np.ndarray | None]) -> None:
        """Give a block's buffers back for reuse."""
        data, mask = block
        self._free.append(data if data.base is None else data.base)
        if mask is not None:
            self._free_masks.append(mask if mask.base is None else mask.base)

    def _submit_until(self, stop: int) -> None:
        """Queue background reads of the windows up to index ``stop`` (exclusive)."""
        if self._executor is None:
            return
        while len(self._futures) < min(stop, len(self.windows)):
            win = self.windows[len(self._futures)]
            out = self._buffers(win)
            self._futures.append((self._executor.submit(self._task, win, out), out))

    def _open_private(self):
        """A private handle on the same dataset, or None if it cannot be reopened as such."""
        ds = self.ds
        if getattr(ds, "mode", "r") != "r":  # open for writing: another handle may not see it
            return None
        try:
            h = rasterio.open(ds.name, sharing=False)
        except Exception:  # not reopenable by name (e.g. an in-memory dataset)
            return None
        same = (
            h.width == ds.width
            and h.height == ds.height
            and h.count == ds.count
            and h.dtypes == ds.dtypes
            and h.transform == ds.transform
            and h.block_shapes == ds.block_shapes
            and h.nodatavals == ds.nodatavals
            and h.mask_flag_enums == ds.mask_flag_enums
        )
        if not same:
            h.close()
            return None
        return h

    def _read_with(self, src, win: Window, out: tuple[np.ndarray, np.ndarray | None]):
        data = src.read(self.band, window=win, out=out[0])
        mask = src.read_masks(self.band, window=win, out=out[1]) if self.with_mask else None
        return data, mask

    def _task(self, win: Window, out: tuple[np.ndarray, np.ndarray | None]):
        """Read one window on a private handle (any thread; a handle serves one at a time)."""
        try:
            entry = self._handles.get_nowait()
        except queue.Empty:
            entry = [rasterio.open(self.ds.name, sharing=False), 0]
        try:
            block = self._read_with(entry[0], win, out)
        except BaseException:
            entry[0].close()
            raise
        entry[1] += 1
        if entry[1] >= self._recycle_reads:
            entry[0].close()
        else:
            self._handles.put(entry)
        return block

    def _next(self, i: int, win: Window):
        if not self.private:
            return self._read_with(self.ds, win, self._buffers(win))
        if self._executor is None:
            return self._task(win, self._buffers(win))
        self._submit_until(i + self._ahead)
        entry = self._futures[i]
        self._futures[i] = None
        if entry[0] is None:  # read here earlier, while waiting for another block
            return entry[1]
        fut, out = entry
        if fut.cancel():  # no background thread has started it: read it here
            return self._task(win, out)
        # While a background thread reads block i, read the next block none has started.
        j = i + 1
        while not fut.done() and j < len(self._futures):
            later = self._futures[j]
            if later is not None and later[0] is not None and later[0].cancel():
                self._futures[j] = (None, self._task(self.windows[j], later[1]))
                break
            j += 1
        return fut.result()

    def __iter__(self) -> Iterator[tuple[np.ndarray, np.ndarray | None]]:
        for i, win in enumerate(self.windows):
            try:
                block = self._next(i, win)
            except Exception:
                if not self.private:
                    raise
                # e.g. a handle reopened in a worker thread lacks the caller's GDAL options;
                # a genuine read error reappears on the caller's handle and propagates.
                self._stop_workers()
                self.private = False
                block = self._read_with(self.ds, win, self._buffers(win))
            yield block

    def _stop_workers(self) -> None:
        if self._executor is not None:
            self._executor.shutdown(wait=True, cancel_futures=True)
            self._executor = None
        self._futures = []

    def close(self) -> None:
        self._stop_workers()
        while True:
            try:
                entry = self._handles.get_nowait()
            except queue.Empty:
                break
            entry[0].close()


def _status_array(code: np.ndarray) -> np.ndarray:
    """Status names for the codes, as a str array sized to the longest name present."""
    present = np.flatnonzero(np.bincount(code, minlength=len(_STATUS_NAMES)))
    width = max((len(_STATUS_NAMES[k]) for k in present), default=1)
    return np.array(_STATUS_NAMES, dtype=f"<U{width}")[code]


def sample_dem(
    ds: rasterio.io.DatasetReader,
    x: ArrayLike,
    y: ArrayLike,
    *,
    band: int = 1,
    workers: int | None = None,
) -> SampleResult:
    """Bilinear DEM values at points given in the dataset's own CRS, read block by block.

    Parameters
    ----------
    ds : open rasterio dataset (GeoTIFF, VRT, …) with a north-up transform.
    x, y : array_like
        Point coordinates in ``ds.crs`` [CRS units]; NaN coordinates get ``bad_coordinate``.
    band : int
        Band to read.
    workers : int, optional
        Threads decoding blocks, the calling thread included, on private read-only handles
        of the same dataset (reopened from ``ds.name``); the others read a few blocks ahead.
        ``0``: read through ``ds`` only, in the calling thread (GDAL then caches every block
        read, up to ``GDAL_CACHEMAX``). Default: 2 (1 on a single CPU) when at least 8 blocks
        are to be decoded, else 0; falls back to 0 if ``ds`` cannot be reopened by name or
        a private read fails. Results do not depend on it.

    Returns
    -------
    SampleResult
        Values in the raster's units, a status per point, and the number of blocks decoded.

    Notes
    -----
    Cell centres follow GDAL's convention: cell (i, j) covers [j, j+1) × [i, i+1) in pixel
    space and its centre is at (i+0.5, j+0.5). A point within half a cell of the raster edge
    is clamped onto the edge cells' centres (constant extrapolation across the half cell).
    The value is :func:`bilinear_sample`'s on the 2 × 2 stencil of cells around the point.

    A cell is nodata where the dataset's mask says so (nodata value, NaN/inf, or a per-dataset
    or alpha mask when the band has one); for a band whose mask is its nodata value, the
    value is compared with it directly (exact equality in float64) instead of reading the mask.

    Points are grouped by the block holding their stencil's upper-left cell ("home" block),
    homes are visited in row-major order, and every block holding a stencil cell is decoded
    exactly once, on its natural boundaries. Memory: about one row of blocks plus a few blocks
    in flight, independent of the raster size; GDAL's own cache is bounded by recycling the
    private handles (with ``workers=0`` it is whatever ``GDAL_CACHEMAX`` allows).

    Raises
    ------
    SamplingError
        Rotated raster, ``x`` and ``y`` of different lengths, or ``workers < 0``.

    References
    ----------
    Bilinear weights: Press et al., Numerical Recipes, §3.6. Block scheduling: from memory
    (plain row-major tiling with last-use eviction; no published source).
    """
    x = np.asarray(x, dtype=float).ravel()
    y = np.asarray(y, dtype=float).ravel()
    if x.shape != y.shape:
        raise SamplingError(f"x and y differ in length ({x.size} and {y.size})")
    if workers is not None and workers < 0:
        raise SamplingError(f"workers must be >= 0, got {workers}")
    n = x.size
    value = np.full(n, np.nan)
    code = np.full(n, _BAD, dtype=np.int8)
    if n == 0:
        return SampleResult(value, _status_array(code), 0)
    t = ds.transform
    if t.b != 0 or t.d != 0:
        raise SamplingError(
            "sample_dem needs a north-up raster (no rotation terms in the transform)"
        )
    h, w = ds.height, ds.width
    finite = np.isfinite(x) & np.isfinite(y)
    with np.errstate(invalid="ignore", over="ignore"):
        colf = (x - t.c) / t.a
        rowf = (y - t.f) / t.e
    inside = finite & (colf >= 0) & (colf <= w) & (rowf >= 0) & (rowf <= h)
    code[finite & ~inside] = _OUTSIDE
    idx = np.flatnonzero(inside)
    del finite, inside
    if idx.size == 0:
        return SampleResult(value, _status_array(code), 0)

    # Stencil in the cell-centre frame, clamped at the raster edges: upper-left cell (r0, c0)
    # and fractional offsets (dr, dc); the lower-right cell is (min(r0+1, h-1), min(c0+1, w-1)).
    rc = rowf[idx]
    cc = colf[idx]
    del rowf, colf
    rc -= 0.5
    cc -= 0.5
    np.clip(rc, 0.0, h - 1.0, out=rc)
    np.clip(cc, 0.0, w - 1.0, out=cc)
    itype = np.int32 if max(h, w) < 2**31 - 2 else np.int64
    r0 = rc.astype(itype)  # truncation = floor: rc, cc >= 0 after the clip
    c0 = cc.astype(itype)
    np.clip(r0, 0, max(h - 2, 0), out=r0)
    np.clip(c0, 0, max(w - 2, 0), out=c0)
    rc -= r0
    cc -= c0
    dr = np.clip(rc, 0.0, 1.0, out=rc)
    dc = np.clip(cc, 0.0, 1.0, out=cc)
    del rc, cc

    bh, bw = ds.block_shapes[band - 1]
    nbc = -(-w // bw)  # blocks per row
    n_blocks = nbc * -(-h // bh)
    ktype = np.int32 if n_blocks < 2**31 - 1 else np.int64
    key = (r0 // bh).astype(ktype, copy=False)  # the home block of each point (row-major id)
    key *= nbc
    key += c0 // bw
    # Homes in row-major order (group g = the g-th home), and which neighbours each needs: the
    # stencil reaches into the block below where r0 + 1 starts a block row, into the block to
    # the right likewise. Dense counting when the raster has few blocks for the points, else
    # a sort (a continental mosaic may have millions of blocks).
    if n_blocks <= _DENSE_BLOCKS_PER_POINT * key.size + _DENSE_MIN_BLOCKS:
        counts = np.bincount(key, minlength=n_blocks)
        homes = np.flatnonzero(counts)
        counts = counts[homes]
        gid = np.zeros(n_blocks, dtype=np.int32)
        gid[homes] = np.arange(homes.size, dtype=np.int32)
        grp = gid[key]
        del gid
    else:
        homes, grp, counts = np.unique(key, return_inverse=True, return_counts=True)
    del key
    ng = homes.size
    down = ((r0 + 1) % bh == 0) & (r0 + 1 < h)
    right = ((c0 + 1) % bw == 0) & (c0 + 1 < w)
    g_down = np.zeros(ng, dtype=bool)
    g_right = np.zeros(ng, dtype=bool)
    g_diag = np.zeros(ng, dtype=bool)
    g_down[grp[down]] = True
    g_right[grp[right]] = True
    g_diag[grp[down & right]] = True
    del down, right
    # Every (home, block) use in visiting order; a block is decoded at its first use and
    # dropped after its last one.
    gi = np.arange(ng)
    use_block = np.concatenate(
        [homes, homes[g_right] + 1, homes[g_down] + nbc, homes[g_diag] + nbc + 1]
    )
    use_group = np.concatenate([gi, gi[g_right], gi[g_down], gi[g_diag]])
    seq = np.lexsort((use_block, use_group))
    use_block, use_group = use_block[seq], use_group[seq]
    blocks, first = np.unique(use_block, return_index=True)
    last_group = np.full(blocks.size, -1, dtype=np.int64)
    np.maximum.at(last_group, np.searchsorted(blocks, use_block), use_group)
    decode_order = blocks[np.argsort(first, kind="stable")]
    free_after = np.split(
        blocks[np.argsort(last_group, kind="stable")],
        np.searchsorted(np.sort(last_group), gi, side="right")[:-1],
    )
    del use_block, use_group, seq, first, last_group

    def window(b: int) -> Window:
        r_off, c_off = (b // nbc) * bh, (b % nbc) * bw
        return Window(c_off, r_off, min(bw, w - c_off), min(bh, h - r_off))

    flags = ds.mask_flag_enums[band - 1]
    with_mask = MaskFlags.per_dataset in flags or MaskFlags.alpha in flags
    if workers is None:
        workers = min(2, os.cpu_count() or 1) if decode_order.size >= _PARALLEL_MIN_BLOCKS else 0
    # Worker threads start decoding now, while the points are sorted by home block.
    dtype = np.dtype(ds.dtypes[band - 1])
    reader = _BlockReader(
        ds, band, [window(int(b)) for b in decode_order], int(workers), with_mask, dtype
    )
    try:
        # Small integer keys sort by radix sort (stable), much faster than wide ones.
        small = np.uint8 if ng <= 256 else np.uint16 if ng <= 65536 else np.int64
        order = np.argsort(grp.astype(small, copy=False), kind="stable")
        del grp
        ends = np.cumsum(counts)
        starts = ends - counts
        del counts

        m = idx.size
        vals = [np.empty(m, dtype=dtype) for _ in range(4)]
        masks = [np.empty(m, dtype=bool) for _ in range(4)] if with_mask else None
        cache: dict[int, tuple[np.ndarray, np.ndarray | None]] = {}
        halo = _Halo(bh, bw, dtype, with_mask)
        stream = iter(reader)
        decoded = 0
        for g in range(ng):
            home = int(homes[g])
            need = [home]
            if g_right[g]:
                need.append(home + 1)
            if g_down[g]:
                need.append(home + nbc)
            if g_diag[g]:
                need.append(home + nbc + 1)
            for b in need:
                while b not in cache:
                    cache[int(decode_order[decoded])] = next(stream)
                    decoded += 1
            pts = order[starts[g] : ends[g]]
            r_off, c_off = (home // nbc) * bh, (home % nbc) * bw
            lr0 = r0[pts] - r_off
            lc0 = c0[pts] - c_off
            lr1 = np.minimum(lr0 + 1, h - 1 - r_off)
            lc1 = np.minimum(lc0 + 1, w - 1 - c_off)
            corners = ((lr0, lc0), (lr0, lc1), (lr1, lc0), (lr1, lc1))
            grid = halo.build(cache, home, nbc, 0, g_right[g], g_down[g], g_diag[g])
            for k, (rr, cc_) in enumerate(corners):
                vals[k][pts] = grid[rr, cc_]
            if masks is not None:
                grid = halo.build(cache, home, nbc, 1, g_right[g], g_down[g], g_diag[g])
                for k, (rr, cc_) in enumerate(corners):
                    masks[k][pts] = grid[rr, cc_] != 0
            for b in free_after[g]:
                reader.release(cache.pop(int(b)))
    finally:
        reader.close()
    del r0, c0, order

    # Validity and the bilinear combination, in chunks to bound the temporaries.
    nodata = ds.nodatavals[band - 1]
    check_nodata = nodata is not None and np.isfinite(nodata)
    for s in range(0, m, _COMBINE_CHUNK):
        sl = slice(s, s + _COMBINE_CHUNK)
        chunk = [vv[sl] for vv in vals]
        valid = []
        for k in range(4):
            ok = np.isfinite(chunk[k])
            if check_nodata:
                ok &= chunk[k] != np.float64(nodata)
            if masks is not None:
                ok &= masks[k][sl]
            valid.append(ok)
        v, incomplete = _combine(chunk, valid, dr[sl], dc[sl])
        value[idx[sl]] = v
        code[idx[sl]] = np.where(np.isnan(v), _NODATA, np.where(incomplete, _PARTIAL, _OK))
    del vals, masks, dr, dc, idx, chunk, valid, v, incomplete
    return SampleResult(value, _status_array(code), int(decode_order.size))


class _Halo:
    """A reusable buffer holding a home block extended by the first column of the block to
    its right and/or the first row of the block below, for stencils crossing those edges."""

    def __init__(self, bh: int, bw: int, dtype: str, with_mask: bool):
        self.buf = [np.empty((bh + 1, bw + 1), dtype=dtype)]
        if with_mask:
            self.buf.append(np.empty((bh + 1, bw + 1), dtype=np.uint8))

    def build(self, cache, home: int, nbc: int, layer: int, right, down, diag) -> np.ndarray:
        """The home block's data (layer 0) or mask (layer 1), with the needed halo."""
        blk = cache[home][layer]
        if not (right or down):
            return blk
        bhe, bwe = blk.shape
        out = self.buf[layer][: bhe + bool(down), : bwe + bool(right)]
        out[:bhe, :bwe] = blk
        if right:
            out[:bhe, bwe] = cache[home + 1][layer][:, 0]
        if down:
            out[bhe, :bwe] = cache[home + nbc][layer][0, :]
        if diag:
            out[bhe, bwe] = cache[home + nbc + 1][layer][0, 0]
        return out
