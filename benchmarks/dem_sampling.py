"""Benchmark of the block-wise DEM sampler (``pipeline.terrain.sample_dem``); not a test.

Baselines, all measured in the same process on the same points (uniformly random over the
DEM, in input order) and each on a freshly opened dataset (cold GDAL block cache, warm OS
page cache after a warm-up pass):

* ``rasterio``: ``DatasetReader.sample`` with default settings (nearest cell, one small
  window read per point);
* ``in_memory``: the whole band read at once (``ds.read(band)``) and the same numpy bilinear
  interpolation (:func:`pipeline.terrain.bilinear_sample`) on the full array;
* ``decode floor``: each raster block holding a stencil cell of some point read once, in
  row-major order, with ``ds.read(band, window=block_window)`` — the least work any exact
  sampler must do (one decode per touched block), single-threaded.

Peak memory is measured in fresh subprocesses (``VmHWM`` of ``/proc/self/status``), one for
the sampler and one for the in-memory approach, on the same points.

Usage::

    python benchmarks/dem_sampling.py DEM [--points 100000] [--sampler FILE] [--json OUT]

``--sampler FILE`` times another implementation of ``sample_dem`` (a copy of an older
``terrain.py``, for before/after numbers). Invented data only; a planning aid.
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import os
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
if str(REPO) not in sys.path:
    sys.path.insert(0, str(REPO))

import rasterio  # noqa: E402
from rasterio.windows import Window  # noqa: E402

from pipeline import terrain  # noqa: E402

__all__ = [
    "load_sampler",
    "random_points",
    "touched_blocks",
    "time_sampler",
    "time_rasterio_sample",
    "time_in_memory",
    "time_decode_floor",
    "peak_rss_subprocess",
    "station_points",
    "measure",
]


def load_sampler(path: str | Path | None) -> Callable:
    """``sample_dem`` from ``pipeline.terrain``, or from another copy of terrain.py."""
    if path is None:
        return terrain.sample_dem
    spec = importlib.util.spec_from_file_location("_alt_terrain", str(path))
    mod = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = mod  # dataclasses look the module up
    spec.loader.exec_module(mod)
    return mod.sample_dem


def random_points(dem: Path, n: int, seed: int = 1) -> tuple[np.ndarray, np.ndarray]:
    """``n`` points uniformly random over the raster's extent [CRS units]."""
    with rasterio.open(dem) as ds:
        b = ds.bounds
    rng = np.random.default_rng(seed)
    return rng.uniform(b.left, b.right, n), rng.uniform(b.bottom, b.top, n)


def touched_blocks(ds, x: np.ndarray, y: np.ndarray, band: int = 1) -> np.ndarray:
    """(block row, block col) of every block holding one of the four stencil cells of a point
    inside the raster (cell-centre frame, clamped at the edges, as ``sample_dem``)."""
    t = ds.transform
    h, w = ds.height, ds.width
    bh, bw = ds.block_shapes[band - 1]
    col = (x - t.c) / t.a
    row = (y - t.f) / t.e
    ok = np.isfinite(col) & np.isfinite(row) & (col >= 0) & (col <= w) & (row >= 0) & (row <= h)
    rc = np.clip(row[ok] - 0.5, 0, h - 1)
    cc = np.clip(col[ok] - 0.5, 0, w - 1)
    r0 = np.clip(np.floor(rc).astype(np.int64), 0, max(h - 2, 0))
    c0 = np.clip(np.floor(cc).astype(np.int64), 0, max(w - 2, 0))
    r1, c1 = np.minimum(r0 + 1, h - 1), np.minimum(c0 + 1, w - 1)
    nbc = -(-w // bw)
    keys = np.unique(
        np.concatenate([(rr // bh) * nbc + (cc_ // bw) for rr in (r0, r1) for cc_ in (c0, c1)])
    )
    return np.c_[keys // nbc, keys % nbc]


def _best(fn: Callable[[], object], repeats: int) -> tuple[float, object]:
    best, out = np.inf, None
    for _ in range(max(1, repeats)):
        t = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t)
    return best, out


def time_sampler(dem: Path, x, y, sample_fn=terrain.sample_dem, repeats: int = 3, **kw):
    """Best wall time [s] of ``sample_fn`` over ``repeats`` runs, each on a fresh dataset."""

    def run():
        with rasterio.open(dem) as ds:
            return sample_fn(ds, x, y, **kw)

    return _best(run, repeats)


def time_rasterio_sample(dem: Path, x, y, repeats: int = 1):
    """Best wall time [s] of ``list(ds.sample(zip(x, y)))`` (default settings)."""

    def run():
        with rasterio.open(dem) as ds:
            return np.array([v[0] for v in ds.sample(zip(x, y, strict=True))], dtype=float)

    return _best(run, repeats)


def _in_memory_sample(ds, x, y, band: int = 1):
    """Whole-band read, then vectorised bilinear on the full array (same conventions)."""
    t = ds.transform
    h, w = ds.height, ds.width
    grid = ds.read(band)
    nodata = ds.nodatavals[band - 1]
    valid = np.isfinite(grid)
    if nodata is not None and np.isfinite(nodata):
        valid &= grid != nodata
    col = (x - t.c) / t.a
    row = (y - t.f) / t.e
    ok = np.isfinite(col) & np.isfinite(row) & (col >= 0) & (col <= w) & (row >= 0) & (row <= h)
    value = np.full(x.shape, np.nan)
    v, _ = terrain.bilinear_sample(
        grid, valid, np.clip(row[ok] - 0.5, 0, h - 1), np.clip(col[ok] - 0.5, 0, w - 1)
    )
    value[ok] = v
    return value


def time_in_memory(dem: Path, x, y, repeats: int = 3):
    """Best wall time [s] of the in-memory approach."""

    def run():
        with rasterio.open(dem) as ds:
            return _in_memory_sample(ds, x, y)

    return _best(run, repeats)


def time_decode_floor(dem: Path, blocks: np.ndarray, repeats: int = 3, band: int = 1):
    """Best wall time [s] to read each block in ``blocks`` once (row-major order)."""

    def run():
        with rasterio.open(dem) as ds:
            bh, bw = ds.block_shapes[band - 1]
            for br, bc in blocks:
                r, c = int(br) * bh, int(bc) * bw
                ds.read(band, window=Window(c, r, min(bw, ds.width - c), min(bh, ds.height - r)))
        return len(blocks)

    return _best(run, repeats)


def _status_mb() -> dict[str, float]:
    out = {}
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith(("VmRSS", "VmHWM")):
                out[line.split(":")[0]] = int(line.split()[1]) / 1024.0
    return out


def _child(args) -> None:
    """Subprocess body: one approach on the points, then report peak RSS as JSON."""
    if args.stations:
        x, y = station_points(args.stations, args.dem)
    else:
        x, y = random_points(args.dem, args.points, args.seed)
    sample_fn = load_sampler(args.sampler)
    with rasterio.open(args.dem) as ds:
        base = _status_mb()
        t = time.perf_counter()
        if args.child == "sampler":
            val = sample_fn(ds, x, y).value
        else:
            val = _in_memory_sample(ds, x, y)
        dt = time.perf_counter() - t
    st = _status_mb()
    print(
        json.dumps(
            {
                "base_rss_mb": base["VmRSS"],
                "base_hwm_mb": base["VmHWM"],
                "peak_rss_mb": st["VmHWM"],
                "seconds": dt,
                "checksum": float(np.nansum(val)),
            }
        )
    )


def station_points(stations: Path, dem: Path) -> tuple[np.ndarray, np.ndarray]:
    """A station table's lon/lat (EPSG:4326) in the DEM's CRS; unparsable rows give NaN."""
    import pandas as pd

    st = pd.read_csv(stations, usecols=["lon", "lat"], dtype=str, keep_default_na=False)
    lon = pd.to_numeric(st["lon"], errors="coerce").to_numpy(float)
    lat = pd.to_numeric(st["lat"], errors="coerce").to_numpy(float)
    with rasterio.open(dem) as ds:
        crs = ds.crs
    return terrain.transform_points(lon, lat, "EPSG:4326", crs)


def peak_rss_subprocess(
    kind: str, dem: Path, n: int, seed: int = 1, sampler=None, stations: Path | None = None
) -> dict:
    """Run ``kind`` ("sampler" or "in_memory") in a fresh interpreter on ``n`` random points
    (or a station table's positions); its peak RSS [MB]."""
    cmd = [
        sys.executable,
        str(Path(__file__).resolve()),
        str(dem),
        "--child",
        kind,
        "--points",
        str(n),
        "--seed",
        str(seed),
    ]
    if sampler:
        cmd += ["--sampler", str(sampler)]
    if stations:
        cmd += ["--stations", str(stations)]
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    proc = subprocess.run(cmd, capture_output=True, text=True, env=env, timeout=1800)
    if proc.returncode != 0:
        raise RuntimeError(f"{kind} subprocess failed: {proc.stderr[-2000:]}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def measure(
    dem: Path,
    *,
    points: int = 100_000,
    points_large: int | None = 1_000_000,
    rasterio_subset_large: int | None = None,
    seed: int = 1,
    sampler=None,
    repeats: int = 3,
    rss: bool = True,
    log: Callable[[str], None] = print,
) -> dict:
    """All DEM-sampling measurements on ``dem``; returns the result keys (see run.py).

    ``rasterio_subset_large``: time ``DatasetReader.sample`` at the large size on this many
    of the points only and scale linearly (quick mode); None times all of them.
    """
    sample_fn = load_sampler(sampler)
    res: dict = {"dem_sampling_dem": str(dem), "dem_sampling_points": points}
    with rasterio.open(dem) as ds:
        res["dem_sampling_dem_shape"] = [ds.height, ds.width]
        res["dem_sampling_block_shape"] = list(ds.block_shapes[0])
        nodata = ds.nodata
    x, y = random_points(dem, points, seed)
    with rasterio.open(dem) as ds:
        blocks = touched_blocks(ds, x, y)
    time_decode_floor(dem, blocks, repeats=1)  # warm-up: OS page cache, imports

    # Sampler, in-memory approach and decode floor interleaved, best of ``repeats`` each, so
    # a change in machine load affects them alike.
    t_s = t_m = t_f = np.inf
    for _ in range(max(1, repeats)):
        t, r_s = time_sampler(dem, x, y, sample_fn, 1)
        t_s = min(t_s, t)
        t, v_m = time_in_memory(dem, x, y, 1)
        t_m = min(t_m, t)
        t, _ = time_decode_floor(dem, blocks, 1)
        t_f = min(t_f, t)
    log(f"  sampler {points:,} pts: {t_s:.3f} s ({r_s.blocks_read} blocks)")
    log(f"  in-memory {points:,} pts: {t_m:.3f} s")
    log(f"  decode floor ({len(blocks)} blocks): {t_f:.3f} s")
    t_r, v_r = time_rasterio_sample(dem, x, y, repeats=1)
    log(f"  rasterio sample {points:,} pts: {t_r:.3f} s")
    res.update(
        dem_sampling_s=t_s,
        dem_sampling_pts_per_s=points / t_s,
        dem_sampling_blocks_read=int(r_s.blocks_read),
        dem_sampling_touched_blocks=int(len(blocks)),
        rasterio_sample_s=t_r,
        in_memory_s=t_m,
        decode_floor_s=t_f,
        dem_sampling_vs_rasterio_sample=t_r / t_s,
        dem_sampling_vs_in_memory=t_m / t_s,
        dem_sampling_vs_decode_floor=t_s / t_f,
        dem_sampling_max_abs_diff_vs_in_memory=float(np.nanmax(np.abs(r_s.value - v_m))),
        dem_sampling_nan_agree_with_in_memory=bool(
            np.array_equal(np.isnan(r_s.value), np.isnan(v_m))
        ),
    )
    # rasterio samples the nearest cell, the sampler interpolates: a sanity check only
    v_r = np.where(v_r == nodata, np.nan, v_r) if nodata is not None else v_r
    res["dem_sampling_median_abs_diff_vs_rasterio_nearest"] = float(
        np.nanmedian(np.abs(r_s.value - v_r))
    )

    if points_large:
        xl, yl = random_points(dem, points_large, seed + 1)
        with rasterio.open(dem) as ds:
            blocks_l = touched_blocks(ds, xl, yl)
        t_sl = t_fl = np.inf
        for _ in range(max(1, repeats)):
            t, r_sl = time_sampler(dem, xl, yl, sample_fn, 1)
            t_sl = min(t_sl, t)
            t, _ = time_decode_floor(dem, blocks_l, 1)
            t_fl = min(t_fl, t)
        log(f"  sampler {points_large:,} pts: {t_sl:.3f} s")
        if rasterio_subset_large and rasterio_subset_large < points_large:
            k = rasterio_subset_large
            t_rl, _ = time_rasterio_sample(dem, xl[:k], yl[:k])
            t_rl *= points_large / k
            res["rasterio_sample_1m_extrapolated_from"] = k
            log(f"  rasterio sample {points_large:,} pts: {t_rl:.3f} s (scaled from {k:,})")
        else:
            t_rl, _ = time_rasterio_sample(dem, xl, yl)
            log(f"  rasterio sample {points_large:,} pts: {t_rl:.3f} s")
        res.update(
            dem_sampling_points_1m=points_large,
            dem_sampling_1m_s=t_sl,
            dem_sampling_1m_pts_per_s=points_large / t_sl,
            rasterio_sample_1m_s=t_rl,
            dem_sampling_vs_rasterio_sample_1m=t_rl / t_sl,
            dem_sampling_1m_vs_decode_floor=t_sl / t_fl,
        )

    if rss:
        s = peak_rss_subprocess("sampler", dem, points, seed, sampler)
        m = peak_rss_subprocess("in_memory", dem, points, seed, sampler)
        res.update(
            dem_sampling_peak_rss_mb=s["peak_rss_mb"],
            in_memory_peak_rss_mb=m["peak_rss_mb"],
            dem_sampling_rss_base_mb=s["base_hwm_mb"],
            in_memory_rss_base_mb=m["base_hwm_mb"],
            dem_sampling_rss_vs_in_memory=s["peak_rss_mb"] / m["peak_rss_mb"],
            dem_sampling_net_rss_vs_in_memory=(s["peak_rss_mb"] - s["base_hwm_mb"])
            / max(m["peak_rss_mb"] - m["base_hwm_mb"], 1e-9),
        )
        log(
            f"  peak RSS sampler {s['peak_rss_mb']:.0f} MB (base {s['base_hwm_mb']:.0f}), "
            f"in-memory {m['peak_rss_mb']:.0f} MB (base {m['base_hwm_mb']:.0f})"
        )
    return res


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="Benchmark the block-wise DEM sampler.")
    ap.add_argument("dem", type=Path)
    ap.add_argument("--points", type=int, default=100_000)
    ap.add_argument("--points-large", type=int, default=1_000_000, help="0 to skip")
    ap.add_argument("--rasterio-subset-large", type=int, default=None)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--sampler", type=Path, default=None, help="another terrain.py to time")
    ap.add_argument("--no-rss", action="store_true")
    ap.add_argument("--json", type=Path, default=None)
    ap.add_argument("--child", choices=["sampler", "in_memory"], help=argparse.SUPPRESS)
    ap.add_argument("--stations", type=Path, default=None, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        _child(args)
        return 0
    res = measure(
        args.dem,
        points=args.points,
        points_large=args.points_large or None,
        rasterio_subset_large=args.rasterio_subset_large,
        seed=args.seed,
        sampler=args.sampler,
        repeats=args.repeats,
        rss=not args.no_rss,
    )
    for k, v in res.items():
        print(f"  {k:<50} {v:.4g}" if isinstance(v, float) else f"  {k:<50} {v}")
    if args.json:
        args.json.write_text(json.dumps(res, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
