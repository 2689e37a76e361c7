"""All file access of altigrade: reading inputs, writing outputs atomically.

Calculation modules never open files; stages call the functions here.
"""

from __future__ import annotations

import csv
import hashlib
import io as _io
import os
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import rasterio
from pyproj import CRS

from pipeline.errors import InputFileError, OutputError

__all__ = [
    "RawTable",
    "read_station_table",
    "open_dem",
    "read_vector",
    "file_sha256",
    "atomic_path",
    "write_text_atomic",
    "write_gpkg_layers",
    "VECTOR_SUFFIXES",
]

VECTOR_SUFFIXES = {".gpkg", ".geojson", ".json", ".shp", ".fgb", ".gml", ".kml", ".sqlite", ".zip"}
_ENCODINGS = ("utf-8-sig", "cp1252", "latin-1")


class RawTable:
    """A station table as read, every cell kept as text.

    Attributes
    ----------
    frame : DataFrame of str (empty cells as "")
    source_rows : ndarray of int — the 1-based line (CSV) or feature (vector) number of each row
    geometry : GeoSeries or None — geometry of vector inputs, in ``crs``
    crs : CRS or None
    encoding, delimiter, decimal : how a CSV was read (for the manifest)
    """

    def __init__(
        self, frame, source_rows, geometry=None, crs=None, *, encoding="", delimiter="", decimal="."
    ):
        self.frame = frame
        self.source_rows = np.asarray(source_rows, dtype=np.int64)
        self.geometry = geometry
        self.crs = crs
        self.encoding = encoding
        self.delimiter = delimiter
        self.decimal = decimal


def file_sha256(path: Path, chunk: int = 1 << 20) -> str:
    """SHA-256 of a file's bytes (hex)."""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        while block := f.read(chunk):
            h.update(block)
    return h.hexdigest()


def _decode(raw: bytes, path: Path) -> tuple[str, str]:
    if b"\x00" in raw[:4096]:
        # UTF-16 with BOM is the one common NUL-bearing text encoding.
        if raw[:2] in (b"\xff\xfe", b"\xfe\xff"):
            return raw.decode("utf-16"), "utf-16"
        raise InputFileError(f"{path}: looks like a binary file, not a text table")
    for enc in _ENCODINGS:
        try:
            return raw.decode(enc), enc
        except UnicodeDecodeError:
            continue
    raise InputFileError(
        f"{path}: cannot decode the text"
    )  # pragma: no cover - latin-1 decodes all


def _sniff_delimiter(text: str) -> str:
    head = "\n".join(text.splitlines()[:20])
    try:
        return csv.Sniffer().sniff(head, delimiters=",;\t|").delimiter
    except csv.Error:
        counts = {d: head.count(d) for d in (",", ";", "\t", "|")}
        return max(counts, key=counts.get) if any(counts.values()) else ","


def read_station_table(path: Path, layer: str | None = None) -> RawTable:
    """Read a station table: CSV/TSV text (any common delimiter, BOM, legacy encodings) or a
    vector file GDAL reads. Every attribute is returned as text for row-level validation.

    Raises
    ------
    InputFileError
        The file is missing, empty, unreadable, or has no header.
    """
    path = Path(path)
    if not path.exists():
        raise InputFileError(f"{path}: station file not found")
    if path.suffix.lower() in VECTOR_SUFFIXES:
        return _read_station_vector(path, layer)
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise InputFileError(f"{path}: cannot read ({exc.strerror or exc})") from None
    if not raw.strip():
        raise InputFileError(f"{path}: the station file is empty")
    text, enc = _decode(raw, path)
    delim = _sniff_delimiter(text)
    reader = csv.reader(_io.StringIO(text, newline=""), delimiter=delim)
    try:
        rows = list(reader)
    except csv.Error as exc:
        raise InputFileError(f"{path}: malformed CSV ({exc})") from None
    header_idx = next((i for i, r in enumerate(rows) if any(c.strip() for c in r)), None)
    if header_idx is None:
        raise InputFileError(f"{path}: the station file is empty")
    header = [c.strip().lstrip("\ufeff") for c in rows[header_idx]]
    if len(set(header)) != len(header):
        dup = sorted({h for h in header if header.count(h) > 1})
        raise InputFileError(f"{path}: duplicate column names in the header: {', '.join(dup)}")
    body = []
    lines = []
    for i, r in enumerate(rows[header_idx + 1 :], start=header_idx + 2):
        if not any(c.strip() for c in r):
            continue
        if len(r) < len(header):
            r = r + [""] * (len(header) - len(r))
        elif len(r) > len(header):
            extra = r[len(header) :]
            r = r[: len(header)]
            if any(c.strip() for c in extra):
                r = r + ["\x1f".join(extra)]
        body.append(r)
        lines.append(i)
    cols = list(header)
    if any(len(r) > len(header) for r in body):
        cols = cols + ["_extra_fields"]
        body = [r + [""] * (len(cols) - len(r)) for r in body]
    frame = pd.DataFrame(body, columns=cols, dtype=object).fillna("")
    frame = frame.apply(lambda s: s.astype(str).str.strip())
    decimal = "," if delim != "," and _looks_decimal_comma(frame) else "."
    return RawTable(frame, lines, encoding=enc, delimiter=delim, decimal=decimal)


def _looks_decimal_comma(frame: pd.DataFrame) -> bool:
    sample = frame.head(200).to_numpy().ravel()
    n = sum(1 for v in sample if isinstance(v, str) and _is_decimal_comma_number(v))
    return n > 0


def _is_decimal_comma_number(v: str) -> bool:
    v = v.strip().lstrip("+-")
    if v.count(",") != 1 or "." in v:
        return False
    a, b = v.split(",")
    return a.isdigit() and b.isdigit()


def _read_station_vector(path: Path, layer: str | None) -> RawTable:
    try:
        gdf = pyogrio.read_dataframe(path, layer=layer)
    except Exception as exc:  # pyogrio raises several GDAL-derived types
        raise InputFileError(f"{path}: cannot read as a vector file ({exc})") from None
    if len(gdf.columns) == 0:
        raise InputFileError(f"{path}: the layer has no columns")
    geom = gdf.geometry if isinstance(gdf, gpd.GeoDataFrame) else None
    attrs = pd.DataFrame(gdf.drop(columns=[gdf.geometry.name]) if geom is not None else gdf)
    frame = attrs.astype(object).where(attrs.notna(), "").astype(str)
    frame = frame.apply(lambda s: s.str.strip())
    return RawTable(
        frame,
        np.arange(1, len(frame) + 1),
        geometry=geom,
        crs=gdf.crs if geom is not None else None,
    )


def open_dem(path: Path) -> rasterio.io.DatasetReader:
    """Open a DEM (GeoTIFF or VRT) for block reads, checking it has a CRS and one band.

    Raises
    ------
    InputFileError
        Missing file, not a raster, no CRS, or a rotated transform.
    """
    path = Path(path)
    if not path.exists():
        raise InputFileError(f"{path}: DEM not found")
    try:
        ds = rasterio.open(path)
    except rasterio.errors.RasterioIOError as exc:
        raise InputFileError(f"{path}: cannot open as a raster ({exc})") from None
    if ds.crs is None:
        ds.close()
        raise InputFileError(f"{path}: the DEM has no CRS; assign one (e.g. gdal_edit.py -a_srs)")
    t = ds.transform
    if t.b != 0 or t.d != 0:
        ds.close()
        raise InputFileError(f"{path}: the DEM is rotated; warp it north-up first")
    return ds


def read_vector(path: Path, *, what: str, layer: str | None = None) -> gpd.GeoDataFrame:
    """Read a vector layer (any format GDAL reads) as a GeoDataFrame with a CRS.

    Raises
    ------
    InputFileError
        Missing, unreadable, or without a CRS.
    """
    path = Path(path)
    if not path.exists():
        raise InputFileError(f"{path}: {what} file not found")
    try:
        gdf = pyogrio.read_dataframe(path, layer=layer)
    except Exception as exc:
        raise InputFileError(f"{path}: cannot read the {what} ({exc})") from None
    if not isinstance(gdf, gpd.GeoDataFrame) or gdf.crs is None:
        raise InputFileError(f"{path}: the {what} layer has no geometry or no CRS")
    return gdf


# ----------------------------------------------------------------------------------- writing


@contextmanager
def atomic_path(final: Path) -> Iterator[Path]:
    """Yield a temporary path beside ``final``; on success it is renamed over ``final``.

    A run killed before the rename leaves ``final`` as it was (the previous output) and at
    most a stray ``.tmp-*`` file, which the next run removes.
    """
    final = Path(final)
    try:
        final.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".tmp-{final.name}-", dir=final.parent)
        os.close(fd)
        os.unlink(tmp)
    except OSError as exc:
        raise OutputError(f"{final.parent}: cannot write here ({exc.strerror or exc})") from None
    tmp_path = Path(tmp + final.suffix)
    try:
        yield tmp_path
        os.replace(tmp_path, final)
    except OSError as exc:
        raise OutputError(f"{final}: cannot write ({exc.strerror or exc})") from None
    finally:
        if tmp_path.exists():
            tmp_path.unlink()


def write_text_atomic(final: Path, text: str) -> None:
    """Write UTF-8 text to ``final`` via a temporary file and an atomic rename."""
    with atomic_path(final) as tmp:
        tmp.write_text(text, encoding="utf-8")


def write_gpkg_layers(final: Path, layers: dict[str, gpd.GeoDataFrame], crs: CRS | str) -> None:
    """Write several layers into one GeoPackage, atomically (all layers or none).

    Every layer is reprojected to ``crs``. Layers without geometry rows are written with
    null geometries (GeoPackage allows them) so no row is lost.
    """
    with atomic_path(final) as tmp:
        for name, gdf in layers.items():
            g = gdf
            if g.crs is not None and CRS.from_user_input(crs) != g.crs:
                g = g.to_crs(crs)
            elif g.crs is None:
                g = g.set_crs(crs, allow_override=True)
            pyogrio.write_dataframe(g, tmp, layer=name, driver="GPKG", promote_to_multi=False)
