"""The DEM may be a VRT mosaic of tiles: sampling across tile seams equals the single raster."""

from __future__ import annotations

import numpy as np
import rasterio
from rasterio.transform import from_origin

from pipeline.terrain import sample_dem

VRT = """<VRTDataset rasterXSize="{w}" rasterYSize="{h}">
  <SRS>EPSG:32608</SRS>
  <GeoTransform>300000, 30, 0, 4500000, 0, -30</GeoTransform>
  <VRTRasterBand dataType="Float32" band="1">
    <NoDataValue>-9999</NoDataValue>
{sources}
  </VRTRasterBand>
</VRTDataset>
"""
SOURCE = """    <SimpleSource>
      <SourceFilename relativeToVRT="1">{name}</SourceFilename>
      <SourceBand>1</SourceBand>
      <SrcRect xOff="0" yOff="0" xSize="{tw}" ySize="{th}"/>
      <DstRect xOff="{x}" yOff="{y}" xSize="{tw}" ySize="{th}"/>
    </SimpleSource>"""


def _write(path, arr, x0, y0):
    with rasterio.open(
        path,
        "w",
        driver="GTiff",
        width=arr.shape[1],
        height=arr.shape[0],
        count=1,
        dtype="float32",
        crs="EPSG:32608",
        transform=from_origin(x0, y0, 30, 30),
        nodata=-9999,
        tiled=True,
        blockxsize=32,
        blockysize=32,
    ) as ds:
        ds.write(arr, 1)


def test_vrt_mosaic_samples_like_the_whole_raster(tmp_path):
    rng = np.random.default_rng(7)
    h, w, th, tw = 128, 192, 64, 96
    whole = (rng.random((h, w)) * 3000).astype("float32")
    _write(tmp_path / "whole.tif", whole, 300000, 4500000)
    sources = []
    for r in range(0, h, th):
        for c in range(0, w, tw):
            name = f"tile_{r}_{c}.tif"
            _write(
                tmp_path / name, whole[r : r + th, c : c + tw], 300000 + 30 * c, 4500000 - 30 * r
            )
            sources.append(SOURCE.format(name=name, tw=tw, th=th, x=c, y=r))
    (tmp_path / "mosaic.vrt").write_text(VRT.format(w=w, h=h, sources="\n".join(sources)))
    # points concentrated on the tile seams (x = 96 cells, y = 64 cells) and random elsewhere
    xs = np.r_[300000 + 30 * 96 + rng.uniform(-45, 45, 200), 300000 + rng.uniform(0, 30 * w, 200)]
    ys = np.r_[4500000 - rng.uniform(0, 30 * h, 200), 4500000 - 30 * 64 + rng.uniform(-45, 45, 200)]
    with rasterio.open(tmp_path / "whole.tif") as a, rasterio.open(tmp_path / "mosaic.vrt") as b:
        ra, rb = sample_dem(a, xs, ys), sample_dem(b, xs, ys)
    np.testing.assert_allclose(rb.value, ra.value, rtol=0, atol=1e-3)
    assert list(rb.status) == list(ra.status)
