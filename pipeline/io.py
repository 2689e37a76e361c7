"""All file access of altigrade: reading inputs, writing outputs atomically.

Calculation modules never open files; stages call the functions here.

Reading station tables
----------------------
A station table is a text table (CSV/TSV) or any vector file or spreadsheet GDAL reads. Text
tables are read the way a careful person would read a file that came out of a spreadsheet:

* encoding: UTF-8 (with or without BOM), UTF-16/UTF-32 (with BOM, or UTF-16 without BOM),
  otherwise Windows-1252, otherwise Latin-1 (decodes everything); a file that is UTF-8 except
  for a few legacy-encoded lines is decoded line by line (and a note says so);
* delimiter: the one of ``, ; TAB |`` that splits the header line into the most columns, or the
  one an Excel ``sep=`` first line names;
* decimal comma: used when the table is not comma-delimited and more numbers are written with
  a decimal comma than with a decimal point;
* every record keeps the number of the line it starts on. Problems of one record (a value
  spanning several lines, more fields than the header, a last line cut short) are returned per
  row in :attr:`RawTable.row_issues`, so validation rejects that row and the run continues.
  Problems of the file (missing, empty, binary, a quote never closed, duplicate column names)
  raise :class:`~pipeline.errors.InputFileError` naming the file (and line).

Writing
-------
Every output goes through :func:`atomic_path`: it is written under a temporary name in the
destination folder (``.tmp-<name>-<pid>-<random><suffix>``), flushed to disk (``fsync``) and
renamed over the final name with :func:`os.replace` (atomic within one file system); the folder
entry is then flushed too. A process killed at any moment therefore leaves each output either
as it was or complete, never half-written. Temporary files of a killed process (its pid no
longer alive) are removed by the next successful write of the same output.
"""

from __future__ import annotations

import csv
import errno
import hashlib
import io as _io
import os
import re
import tempfile
import warnings
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pyogrio.errors
import rasterio
import rasterio.errors
from pyproj import CRS
from pyproj.exceptions import CRSError

from pipeline.errors import ConfigError, InputFileError, OutputError

__all__ = [
    "RawTable",
    "read_station_table",
    "open_dem",
    "read_vector",
    "file_sha256",
    "read_vector_top",
    "top_positions",
    "atomic_path",
    "write_text_atomic",
    "write_gpkg_layers",
    "write_gpkg_layers_into",
    "csv_text",
    "show_text",
    "one_line",
    "VECTOR_SUFFIXES",
    "SPREADSHEET_SUFFIXES",
]

VECTOR_SUFFIXES = {".gpkg", ".geojson", ".json", ".shp", ".fgb", ".gml", ".kml", ".sqlite", ".zip"}
#: Spreadsheets GDAL reads (first row = header; every cell read as text).
SPREADSHEET_SUFFIXES = {".xlsx", ".ods"}
_DELIMITERS = (",", ";", "\t", "|")
_TMP_PREFIX = ".tmp-"
#: Sidecar files GDAL's SQLite-based drivers may leave beside a database being written.
_SIDECARS = ("-journal", "-wal", "-shm")

# Signatures of binary formats people give by mistake as a station table.
_MAGIC: tuple[tuple[bytes, str], ...] = (
    (
        b"SQLite format 3\x00",
        "is an SQLite database (a GeoPackage?), not a text table; give it the .gpkg extension",
    ),
    (
        b"PK\x03\x04",
        "is a ZIP archive (an .xlsx/.ods workbook?), not a text table; keep its .xlsx, .ods or "
        ".zip extension, or export the sheet as CSV",
    ),
    (
        b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1",
        "is a legacy Excel (.xls) workbook; save the sheet as .xlsx or CSV",
    ),
    (b"%PDF", "is a PDF document, not a table"),
    (b"\x89PNG", "is a PNG image, not a table"),
    (b"II*\x00", "is a TIFF image (a DEM?), not a station table"),
    (b"MM\x00*", "is a TIFF image (a DEM?), not a station table"),
    (b"\x1f\x8b", "is gzip-compressed; decompress it first"),
)

_CONTROL = re.compile(r"[\x00-\x08\x0b-\x1f\x7f-\x9f]")
#: Bytes that do not occur in text tables (all C0 controls but TAB, LF, CR; and DEL).
_CONTROL_BYTES = bytes([*range(0, 9), 11, 12, *range(14, 32), 127])


def show_text(value: Any, limit: int = 80) -> str:
    """A value from an input file, quoted for a one-line message.

    Control, bidirectional-override and other non-printing characters are escaped (Python
    ``repr``), and the text is cut to ``limit`` characters (marked with "…"), so hostile or
    huge cell values can neither break a message over lines nor flood it.
    """
    s = str(value)
    cut = len(s) > limit
    return repr(s[:limit]) + ("…" if cut else "")


def one_line(text: Any, limit: int = 300) -> str:
    """Foreign error text (GDAL, PROJ, pyogrio) squeezed to one line of at most ``limit``."""
    s = " ".join(str(text).split())
    s = _CONTROL.sub(lambda m: f"\\x{ord(m.group()):02x}", s)
    return s if len(s) <= limit else s[: limit - 1] + "…"


class RawTable:
    """A station table as read, every cell kept as text.

    Attributes
    ----------
    frame : DataFrame of str (empty cells as "")
    source_rows : ndarray of int — the 1-based line (text table: the line the record starts
        on) or feature (vector) number of each row
    geometry : GeoSeries or None — geometry of vector inputs, in ``crs``
    crs : CRS or None
    encoding, delimiter, decimal : how a text table was read (for the manifest)
    row_issues : list of str, one per row — why the row cannot be trusted as read ("" if fine)
    notes : list of str — how the file was read, where it matters (reported, not errors)
    """

    def __init__(
        self,
        frame,
        source_rows,
        geometry=None,
        crs=None,
        *,
        encoding="",
        delimiter="",
        decimal=".",
        row_issues=None,
        notes=None,
    ):
        self.frame = frame
        self.source_rows = np.asarray(source_rows, dtype=np.int64)
        self.geometry = geometry
        self.crs = crs
        self.encoding = encoding
        self.delimiter = delimiter
        self.decimal = decimal
        self.row_issues = list(row_issues) if row_issues is not None else [""] * len(frame)
        self.notes = list(notes or [])


def file_sha256(path: Path, chunk: int = 1 << 20) -> str:
    """SHA-256 of a file's bytes (hex)."""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        while block := f.read(chunk):
            h.update(block)
    return h.hexdigest()


# ------------------------------------------------------------------------------ decoding


def _utf16_without_bom(raw: bytes) -> str | None:
    """'utf-16-le'/'utf-16-be' when NUL bytes sit on one side of every byte pair (text in
    the Latin range written as UTF-16 without a byte-order mark), else None."""
    head = raw[:4096]
    if len(head) < 4:
        return None
    even = head[0::2]
    odd = head[1::2]
    z_even = even.count(0) / len(even)
    z_odd = odd.count(0) / len(odd)
    if z_odd > 0.6 and z_even < 0.05:
        return "utf-16-le"
    if z_even > 0.6 and z_odd < 0.05:
        return "utf-16-be"
    return None


def _decode(raw: bytes, path: Path) -> tuple[str, str, list[str]]:
    """Text, encoding name and notes for the bytes of a text table."""
    bom_error = None
    for bom, enc in (
        (b"\xff\xfe\x00\x00", "utf-32"),
        (b"\x00\x00\xfe\xff", "utf-32"),
        (b"\xff\xfe", "utf-16"),
        (b"\xfe\xff", "utf-16"),
    ):
        if raw.startswith(bom):
            try:
                return raw.decode(enc), enc, []
            except UnicodeDecodeError as exc:  # e.g. UTF-16 text starting with U+0000
                bom_error = bom_error or (
                    f"{path}: starts with a {enc.upper()} byte-order mark but is not valid "
                    f"{enc.upper()} (byte {exc.start})"
                )
    if bom_error:
        raise InputFileError(bom_error)
    for magic, what in _MAGIC:
        if raw.startswith(magic):
            raise InputFileError(f"{path}: {what}")
    head = raw[:65536]
    if b"\x00" in head:
        enc = _utf16_without_bom(raw)
        if enc is not None:
            try:
                return raw.decode(enc), enc, [f"{path.name}: read as {enc} (no byte-order mark)"]
            except UnicodeDecodeError:
                pass
    control = sum(head.count(bytes([b])) for b in _CONTROL_BYTES)
    if control > 0.05 * len(head):
        raise InputFileError(f"{path}: looks like a binary file, not a text table")
    try:
        return raw.decode("utf-8-sig"), "utf-8", []
    except UnicodeDecodeError:
        pass
    lines = raw.splitlines(keepends=True)
    utf8_non_ascii = bad = 0
    for ln in lines:
        try:
            ln.decode("utf-8")
        except UnicodeDecodeError:
            bad += 1
        else:
            utf8_non_ascii += any(b > 0x7F for b in ln)
    if utf8_non_ascii and bad:
        # A UTF-8 file with some lines pasted from a legacy-encoded one: decode line by line.
        out, legacy = [], []
        for i, ln in enumerate(lines, start=1):
            try:
                out.append(ln.decode("utf-8-sig" if i == 1 else "utf-8"))
            except UnicodeDecodeError:
                out.append(_decode_legacy(ln))
                legacy.append(i)
        shown = ", ".join(map(str, legacy[:10])) + (" …" if len(legacy) > 10 else "")
        return (
            "".join(out),
            "utf-8+cp1252",
            [f"{path.name}: line(s) {shown} are not UTF-8; read as Windows-1252"],
        )
    for enc in ("cp1252", "latin-1"):
        try:
            return raw.decode(enc), enc, []
        except UnicodeDecodeError:
            continue
    raise InputFileError(f"{path}: cannot decode the text")  # pragma: no cover - latin-1


def _decode_legacy(b: bytes) -> str:
    try:
        return b.decode("cp1252")
    except UnicodeDecodeError:
        return b.decode("latin-1")


# ---------------------------------------------------------------------------- text tables


def _choose_delimiter(text: str) -> tuple[str, str, bool]:
    """(delimiter, text, explicit): Excel's ``sep=X`` line wins (it is blanked so line numbers
    stay); otherwise the candidate that splits the first non-blank line into most fields."""
    first_nl = text.find("\n")
    first = text if first_nl < 0 else text[:first_nl]
    m = re.fullmatch(r"\s*\"?sep=(.)\"?\s*", first)
    if m:
        rest = "" if first_nl < 0 else text[first_nl:]
        return m.group(1), rest, True
    header = next((ln for ln in text.splitlines() if ln.strip()), "")
    best, best_n = ",", 1
    for d in _DELIMITERS:
        try:
            n = len(next(csv.reader([header], delimiter=d)))
        except (csv.Error, StopIteration):
            continue
        if n > best_n:
            best, best_n = d, n
    return best, text, False


_NUM_COMMA = re.compile(r"[+-]?\d+,\d+")
_NUM_DOT = re.compile(r"[+-]?\d*\.\d+")
_THOUSANDS_DOT = re.compile(r"[+-]?\d{1,3}(?:\.\d{3})+")


def _decimal_mark(frame: pd.DataFrame) -> str:
    """',' when more cells are decimal-comma numbers than unambiguous decimal-point ones."""
    comma = dot = 0
    for v in frame.head(500).to_numpy().ravel():
        if not isinstance(v, str) or not v:
            continue
        if _NUM_COMMA.fullmatch(v):
            comma += 1
        elif _NUM_DOT.fullmatch(v) and not _THOUSANDS_DOT.fullmatch(v):
            dot += 1
    return "," if comma > dot else "."


def read_station_table(path: Path, layer: str | None = None) -> RawTable:
    """Read a station table: CSV/TSV text (any common delimiter, BOM, legacy encodings), a
    spreadsheet (.xlsx, .ods) or a vector file GDAL reads. Every attribute is returned as text
    for row-level validation.

    Parameters
    ----------
    path : the file
    layer : layer (vector file) or sheet (spreadsheet) to read; None reads the only one, or the
        one named ``stations``

    Raises
    ------
    InputFileError
        The file is missing, a folder, empty, binary, unreadable, has a quote that is never
        closed, or has no usable header.
    """
    path = Path(path)
    if not path.exists():
        raise InputFileError(f"{path}: station file not found")
    suffix = path.suffix.lower()
    if suffix in VECTOR_SUFFIXES or suffix in SPREADSHEET_SUFFIXES:
        return _read_station_vector(path, layer)
    if path.is_dir():
        raise InputFileError(f"{path}: is a folder, not a station table")
    if not path.is_file():
        raise InputFileError(f"{path}: is not a regular file")
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise InputFileError(f"{path}: cannot read ({exc.strerror or exc})") from None
    if not raw.strip():
        raise InputFileError(f"{path}: the station file is empty")
    text, enc, notes = _decode(raw, path)
    text = text.removeprefix("\ufeff")
    if not text.strip():
        raise InputFileError(f"{path}: the station file is empty")
    text, cr_mark = _protect_stray_cr(text)
    delim, text, explicit = _choose_delimiter(text)
    if explicit:
        notes.append(f"{path.name}: delimiter {delim!r} taken from its 'sep=' line")
    records = _records(text, delim, path)
    header_at = next((k for k, (_, _, r) in enumerate(records) if any(c.strip() for c in r)), None)
    if header_at is None:
        raise InputFileError(f"{path}: the station file is empty")
    h_line, _, header_raw = records[header_at]
    header = [
        c.replace(cr_mark or "\r", "\r").replace("\x00", "\ufffd").strip().lstrip("\ufeff").strip()
        for c in header_raw
    ]
    body_records = [rec for rec in records[header_at + 1 :] if any(c.strip() for c in rec[2])]
    # Columns without a name: dropped when empty throughout (trailing delimiters), else named.
    keep = []
    for j, name in enumerate(header):
        if name:
            keep.append(j)
            continue
        if any(j < len(r) and r[j].strip() for _, _, r in body_records):
            header[j] = f"column_{j + 1}"
            notes.append(f"{path.name}: column {j + 1} has no name; kept as '{header[j]}'")
            keep.append(j)
    if not keep:
        raise InputFileError(f"{path}: line {h_line}: the header has no column names")
    width = len(header)
    names = [header[j] for j in keep]
    if len(set(names)) != len(names):
        dup = sorted({h for h in names if names.count(h) > 1})
        raise InputFileError(
            f"{path}: line {h_line}: duplicate column names in the header: "
            f"{', '.join(show_text(d) for d in dup)}"
        )
    ends_cleanly = text.endswith(("\n", "\r"))
    lengths = [len(r) for _, _, r in body_records]
    usual = max(set(lengths), key=lambda n: (lengths.count(n), -n)) if lengths else width
    body, lines, issues, extras = [], [], [], []
    for k, (start, end, r) in enumerate(body_records):
        problems = []
        if end > start:
            problems.append(
                f"lines {start}–{end} were read as one row: a quote opened on line {start} "
                f"closes only on line {end}"
            )
        if any("\x00" in c for c in r):
            problems.append("the row holds NUL characters (a damaged file?); shown as U+FFFD")
            r = [c.replace("\x00", "\ufffd") for c in r]
        extra = ""
        if len(r) > width:
            surplus = r[width:]
            # Blank surplus fields are trailing delimiters when most rows have them too;
            # a row longer than the others has a value split by an unquoted delimiter.
            if any(c.strip() for c in surplus) or len(r) > usual:
                problems.append(
                    f"the row has {len(r)} fields, the header {width} "
                    "(an unquoted delimiter inside a value?)"
                )
                extra = "\x1f".join(surplus)
            r = r[:width]
        elif len(r) < width:
            if k == len(body_records) - 1 and not ends_cleanly:
                problems.append(
                    f"the last line is incomplete ({len(r)} of {width} fields; file cut short?)"
                )
            r = r + [""] * (width - len(r))
        body.append([r[j] for j in keep])
        extras.append(extra)
        lines.append(start)
        issues.append("; ".join(problems))
    if cr_mark:
        body = [[v.replace(cr_mark, "\r") for v in row] for row in body]
        extras = [x.replace(cr_mark, "\r") for x in extras]
    columns = {c: [row[j].strip() for row in body] for j, c in enumerate(names)}
    if any(extras):
        extra_name = "_extra_fields"
        while extra_name in columns:
            extra_name = "_" + extra_name
        columns[extra_name] = extras
    frame = pd.DataFrame({c: pd.Series(v, dtype=object) for c, v in columns.items()})
    decimal = "." if delim == "," else _decimal_mark(frame)
    return RawTable(
        frame,
        lines,
        encoding=enc,
        delimiter=delim,
        decimal=decimal,
        row_issues=issues,
        notes=notes,
    )


def _protect_stray_cr(text: str) -> tuple[str, str]:
    """In a file whose lines end in LF or CRLF, a carriage return not followed by LF is a
    character inside a value (pasted from a spreadsheet cell), not a line end: hide it from the
    CSV reader behind a private-use mark, restored in the values. Returns (text, mark or "")."""
    if "\n" not in text or not re.search("\r(?!\n)", text):
        return text, ""
    mark = next(chr(c) for c in range(0xE000, 0xF900) if chr(c) not in text)
    return re.sub("\r(?!\n)", mark, text), mark


def _records(text: str, delim: str, path: Path) -> list[tuple[int, int, list[str]]]:
    """(first line, last line, fields) of every CSV record, lines 1-based."""
    reader = csv.reader(_io.StringIO(text, newline=""), delimiter=delim)
    out: list[tuple[int, int, list[str]]] = []
    prev = 0
    try:
        for fields in reader:
            out.append((prev + 1, reader.line_num, fields))
            prev = reader.line_num
    except csv.Error as exc:
        raise InputFileError(f"{path}: line {prev + 1}: malformed CSV ({one_line(exc)})") from None
    if out and out[-1][1] > out[-1][0]:
        # The last record spans several lines: find out whether its quote is ever closed.
        tail = "".join(_io.StringIO(text, newline="").readlines()[out[-1][0] - 1 :])
        try:
            list(csv.reader(_io.StringIO(tail, newline=""), delimiter=delim, strict=True))
        except csv.Error as exc:
            if "end of data" not in str(exc):
                return out
            raise InputFileError(
                f"{path}: line {out[-1][0]}: a quote opened on this line is never closed, so "
                f"every later line would be read as one value; fix the quote"
            ) from None
    return out


# ------------------------------------------------------------------------- vector tables


def _pick_layer(path: Path, layer: str | None, preferred: str, key: str | None) -> str | None:
    try:
        infos = pyogrio.list_layers(path)
    except Exception as exc:  # pyogrio raises several GDAL-derived types
        raise InputFileError(f"{path}: cannot read as a vector file ({one_line(exc)})") from None
    names = [str(n) for n, _ in infos]
    if not names:
        raise InputFileError(f"{path}: the file has no layers")
    if layer is not None:
        if layer not in names:
            raise InputFileError(
                f"{path}: no layer {show_text(layer)}; layers: "
                f"{', '.join(show_text(n) for n in names[:12])}"
            )
        return layer
    if len(names) == 1:
        return names[0]
    if preferred in names:
        return preferred
    hint = f"; name one with {key}" if key else ""
    raise InputFileError(
        f"{path}: has {len(names)} layers ({', '.join(show_text(n) for n in names[:12])}) "
        f"and none is named '{preferred}'{hint}"
    )


def _read_frame(path: Path, layer: str | None, what: str, **open_options: Any):
    """pyogrio.read_dataframe with GDAL errors as InputFileError and warnings as notes."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            gdf = pyogrio.read_dataframe(path, layer=layer, **open_options)
        except Exception as exc:
            raise InputFileError(f"{path}: cannot read the {what} ({one_line(exc)})") from None
    return gdf, [f"{path.name}: {one_line(w.message)}" for w in caught]


def _read_frame_by_arrow(path: Path, layer: str | None, what: str, **open_options: Any):
    """:func:`_read_frame` through GDAL's Arrow stream (faster, and other threads run
    meanwhile), or the usual way where that read fails."""
    try:
        return _read_frame(path, layer, what, use_arrow=True, **open_options)
    except InputFileError:
        return _read_frame(path, layer, what, **open_options)


def _read_station_vector(path: Path, layer: str | None) -> RawTable:
    spreadsheet = path.suffix.lower() in SPREADSHEET_SUFFIXES
    name = _pick_layer(path, layer, "stations", "inputs.stations_layer")
    opts = {"FIELD_TYPES": "STRING", "HEADERS": "FORCE"} if spreadsheet else {}
    gdf, notes = _read_frame(path, name, "station table", **opts)
    geom = gdf.geometry if isinstance(gdf, gpd.GeoDataFrame) else None
    attrs = pd.DataFrame(gdf.drop(columns=[gdf.geometry.name]) if geom is not None else gdf)
    if len(attrs.columns) == 0:
        raise InputFileError(f"{path}: the layer has no attribute columns")
    frame = attrs.astype(object).where(attrs.notna(), "")
    frame = frame.apply(lambda s: s.astype(str).str.strip())
    return RawTable(
        frame,
        np.arange(1, len(frame) + 1),
        geometry=geom,
        crs=gdf.crs if geom is not None else None,
        encoding="(vector)" if not spreadsheet else "(spreadsheet)",
        notes=notes,
    )


# ------------------------------------------------------------------------------------ DEM

_FEET = {"ft", "foot", "feet", "us-ft", "ftus", "us survey foot", "foot_us", "international foot"}


def open_dem(path: Path) -> rasterio.io.DatasetReader:
    """Open a DEM (GeoTIFF or VRT) for block reads, after checking it can serve as one.

    Raises
    ------
    InputFileError
        Missing file, not a raster, no CRS, a rotated transform, not exactly one band,
        elevations declared in feet, a GeoTIFF whose data blocks lie beyond the end of the file
        (truncated download), or a VRT naming a tile that does not exist.
    """
    path = Path(path)
    if not path.exists():
        raise InputFileError(f"{path}: DEM not found")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", rasterio.errors.NotGeoreferencedWarning)
            ds = rasterio.open(path)
    except rasterio.errors.RasterioIOError as exc:
        what = (
            "is a folder GDAL cannot read as a raster"
            if path.is_dir()
            else "cannot open as a raster"
        )
        raise InputFileError(f"{path}: {what} ({one_line(exc)})") from None
    try:
        _check_dem(ds, path)
    except BaseException:
        ds.close()
        raise
    return ds


def _check_dem(ds: rasterio.io.DatasetReader, path: Path) -> None:
    if ds.crs is None:
        raise InputFileError(f"{path}: the DEM has no CRS; assign one (e.g. gdal_edit.py -a_srs)")
    t = ds.transform
    if t.b != 0 or t.d != 0:
        raise InputFileError(f"{path}: the DEM is rotated; warp it north-up first")
    if t.a == 0 or t.e == 0 or (t.a == 1 and t.e == 1 and t.c == 0 and t.f == 0):
        raise InputFileError(f"{path}: the DEM has no geotransform (no cell size or origin)")
    if ds.count != 1:
        raise InputFileError(
            f"{path}: has {ds.count} bands; a DEM has one band of elevations "
            "(an image or a coloured relief is not a DEM)"
        )
    unit = (ds.units[0] or "").strip().lower() if ds.units else ""
    if unit in _FEET:
        raise InputFileError(
            f"{path}: elevations are in feet (unit {unit!r}); convert the DEM to metres first"
        )
    if ds.driver == "GTiff":
        _check_tiff_blocks(ds, path)
    elif ds.driver == "VRT":
        for f in ds.files[1:]:
            if not Path(f).exists():
                raise InputFileError(f"{path}: the VRT names a tile that does not exist: {f}")


def _check_tiff_blocks(ds: rasterio.io.DatasetReader, path: Path) -> None:
    """Every data block of band 1 must lie inside the file (a truncated copy fails here)."""
    try:
        size = os.path.getsize(ds.files[0] if ds.files else path)
    except OSError:
        return
    bh, bw = ds.block_shapes[0]
    nby = -(-ds.height // bh)
    nbx = -(-ds.width // bw)
    if nbx * nby > 1_000_000:  # pragma: no cover - only the last block for huge files
        coords = [(nbx - 1, nby - 1)]
    else:
        coords = [(bx, by) for by in range(nby) for bx in range(nbx)]
    for bx, by in coords:
        off = ds.get_tag_item(f"BLOCK_OFFSET_{bx}_{by}", "TIFF", bidx=1)
        n = ds.get_tag_item(f"BLOCK_SIZE_{bx}_{by}", "TIFF", bidx=1)
        if off is None or n is None:
            return  # not a plain TIFF layout GDAL reports; leave it to the reads
        if int(off) + int(n) > size:
            raise InputFileError(
                f"{path}: the file is truncated or damaged: data block (row {by}, column {bx}) "
                f"ends at byte {int(off) + int(n):,} but the file has {size:,} bytes; copy or "
                "download it again"
            )


# --------------------------------------------------------------------------------- vectors


def read_vector(
    path: Path, *, what: str, layer: str | None = None, arrow: bool = False
) -> gpd.GeoDataFrame:
    """Read a vector layer (any format GDAL reads) as a GeoDataFrame with a CRS.

    With several layers and no ``layer`` given, the layer named like ``what`` (spaces as
    underscores) is read. ``arrow``: read through GDAL's Arrow stream (faster, and it lets
    other threads run meanwhile); a layer it cannot read that way is read the usual way.

    Raises
    ------
    InputFileError
        Missing, unreadable, ambiguous (several layers), or without geometry or CRS.
    """
    path = Path(path)
    if not path.exists():
        raise InputFileError(f"{path}: {what} file not found")
    name = _pick_layer(path, layer, what.replace(" ", "_"), None)
    gdf, _notes = (_read_frame_by_arrow if arrow else _read_frame)(path, name, what)
    if not isinstance(gdf, gpd.GeoDataFrame) or gdf.crs is None:
        raise InputFileError(f"{path}: the {what} layer has no geometry or no CRS")
    return gdf


def top_positions(frame: pd.DataFrame, budget: int, by: tuple[str, ...]) -> np.ndarray:
    """Positions (ascending) of the ``budget`` largest rows of ``frame`` by the ``by`` columns
    it has, in turn (NaN smallest, ties in row order); the first ``budget`` rows without any."""
    total = len(frame)
    cols = [c for c in by if c in frame.columns]
    if not cols:
        return np.arange(min(budget, total))
    keys = [np.nan_to_num(frame[c].to_numpy(float), nan=-np.inf) for c in reversed(cols)]
    order = np.lexsort((np.arange(total), *(-k for k in keys)))
    return np.sort(order[:budget])


def read_vector_top(
    path: Path, *, what: str, budget: int, by: tuple[str, ...]
) -> tuple[gpd.GeoDataFrame, int]:
    """At most ``budget`` features of a vector layer, the largest by the ``by`` columns (those
    the layer has, in turn; ties in file order), in file order; and the layer's row count.

    The rows :func:`top_positions` picks from the whole layer (as ``pipeline.maps.busiest``), but
    only the ranking columns of every row are decoded, and geometries only of the kept rows:
    a map of a state's roads reads a few thousand of its half-million lines.

    Raises
    ------
    InputFileError
        As :func:`read_vector`.
    """
    path = Path(path)
    if not path.exists():
        raise InputFileError(f"{path}: {what} file not found")
    name = _pick_layer(path, None, what.replace(" ", "_"), None)
    try:
        fields = [str(f) for f in pyogrio.read_info(path, layer=name)["fields"]]
    except Exception as exc:
        raise InputFileError(f"{path}: cannot read the {what} ({one_line(exc)})") from None
    cols = [c for c in by if c in fields]
    # the ranking columns of the state's 507,415 roads: 0.08 s by Arrow against 0.52 s
    attrs, _notes = _read_frame_by_arrow(
        path, name, what, columns=cols, read_geometry=False, fid_as_index=True
    )
    total = len(attrs)
    if total <= budget:
        return read_vector(path, what=what, layer=name), total
    keep = top_positions(attrs, budget, by)
    fids = attrs.index.to_numpy()[keep]
    try:
        gdf, _notes = _read_frame(path, name, what, fids=fids, fid_as_index=True)
        # the driver may hand the features back in any order: restore the file's
        gdf = gdf.loc[fids].reset_index(drop=True)
    except (InputFileError, KeyError):
        # a driver without reads by feature id: read the layer and keep the same rows
        gdf = read_vector(path, what=what, layer=name).iloc[keep].reset_index(drop=True)
    if not isinstance(gdf, gpd.GeoDataFrame) or gdf.crs is None:
        raise InputFileError(f"{path}: the {what} layer has no geometry or no CRS")
    return gdf, total


# ----------------------------------------------------------------------------------- writing


def _os_reason(exc: OSError) -> str:
    text = str(exc)
    if exc.errno in (errno.ENOSPC, getattr(errno, "EDQUOT", -1)) or "No space left" in text:
        return "no space left on the device: the disk is full"
    if exc.errno in (errno.EACCES, errno.EPERM):
        return "permission denied"
    if exc.errno == errno.EROFS:
        return "read-only file system"
    if exc.errno in (errno.ENOTDIR, errno.EEXIST) and not isinstance(exc, FileExistsError):
        return "part of the path is a file, not a folder"
    return one_line(exc.strerror or exc)


def _pid_alive(pid: int) -> bool:
    if os.name == "nt":  # pragma: no cover - os.kill(pid, 0) is not a probe on Windows
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:
        return True
    return True


def _remove_quietly(p: Path) -> None:
    for q in (p, *(p.with_name(p.name + s) for s in _SIDECARS)):
        try:
            q.unlink()
        except FileNotFoundError:
            pass
        except OSError:  # pragma: no cover - best effort
            pass


def _sweep_stale(folder: Path, name: str) -> None:
    """Remove temporary files of ``name`` left by processes that are no longer alive."""
    prefix = f"{_TMP_PREFIX}{name}-"
    try:
        entries = list(os.scandir(folder))
    except OSError:  # pragma: no cover - best effort
        return
    for e in entries:
        if not e.name.startswith(prefix) or not e.is_file(follow_symlinks=False):
            continue
        pid_text = e.name[len(prefix) :].split("-", 1)[0]
        if not pid_text.isdigit():
            continue
        pid = int(pid_text)
        if pid != os.getpid() and not _pid_alive(pid):
            try:
                os.unlink(e.path)
            except OSError:  # pragma: no cover - best effort
                pass


def _fsync_path(p: Path) -> None:
    fd = os.open(p, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _fsync_dir(folder: Path) -> None:
    if os.name == "nt":  # pragma: no cover - no directory handles on Windows
        return
    try:
        fd = os.open(folder, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    except OSError:  # pragma: no cover - best effort
        return
    try:
        os.fsync(fd)
    except OSError:  # pragma: no cover - some file systems refuse directory fsync
        pass
    finally:
        os.close(fd)


@contextmanager
def atomic_path(final: Path) -> Iterator[Path]:
    """Yield a temporary path beside ``final``; on success it is flushed to disk and renamed
    over ``final``.

    A process killed before the rename leaves ``final`` as it was (the previous output) and at
    most a stray ``.tmp-<name>-<pid>-*`` file, which the next write of ``final`` removes. If the
    body raises, the temporary file is removed and ``final`` is untouched.

    Raises
    ------
    OutputError
        The folder cannot be created or written, the disk is full, or the rename fails; the
        message names the file and the reason.
    """
    final = Path(final)
    parent = final.parent
    try:
        parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(
            prefix=f"{_TMP_PREFIX}{final.name}-{os.getpid()}-", suffix=final.suffix, dir=parent
        )
        os.close(fd)
        os.unlink(tmp)  # writers such as GDAL want to create the file themselves
    except OSError as exc:
        raise OutputError(f"{parent}: cannot write in this folder ({_os_reason(exc)})") from None
    tmp_path = Path(tmp)
    try:
        yield tmp_path
        if not tmp_path.exists():
            raise OutputError(f"{final}: the writer produced no file")
        _fsync_path(tmp_path)
        os.replace(tmp_path, final)
        _fsync_dir(parent)
    except OutputError:
        raise
    except OSError as exc:
        raise OutputError(f"{final}: cannot write ({_os_reason(exc)})") from None
    finally:
        _remove_quietly(tmp_path)
    _sweep_stale(parent, final.name)


def write_text_atomic(final: Path, text: str) -> None:
    """Write UTF-8 text to ``final`` via a temporary file and an atomic rename.

    Raises
    ------
    OutputError
        See :func:`atomic_path` (e.g. disk full).
    """
    data = text.encode("utf-8")
    with atomic_path(final) as tmp:
        with open(tmp, "wb") as f:
            f.write(data)


_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")
_PLAIN_NUMBER = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?")


def _neutralise(value: Any) -> Any:
    if (
        isinstance(value, str)
        and value.startswith(_FORMULA_START)
        and not _PLAIN_NUMBER.fullmatch(value.strip())
    ):
        return "'" + value
    return value


def csv_text(frame: pd.DataFrame) -> str:
    """CSV text of a table (comma-separated, header, no index) that is safe to open in a
    spreadsheet.

    A text cell starting with ``= + - @``, TAB or CR that is not a plain number gets a leading
    apostrophe, so a spreadsheet shows it as text instead of running it as a formula (the
    "CSV injection" risk described by OWASP; from memory). Numbers, including negative ones,
    are written unchanged.
    """
    df = pd.DataFrame(frame).copy()
    for c in df.columns:
        if df[c].dtype == object or pd.api.types.is_string_dtype(df[c]):
            df[c] = df[c].map(_neutralise)
    return df.to_csv(index=False)


def write_gpkg_layers(final: Path, layers: dict[str, gpd.GeoDataFrame], crs: CRS | str) -> None:
    """Write several layers into one GeoPackage, atomically (all layers or none).

    Every layer is reprojected to ``crs``. Layers without geometry rows are written with
    null geometries (GeoPackage allows them) so no row is lost.

    Raises
    ------
    ConfigError
        ``crs`` is not a CRS pyproj knows.
    OutputError
        The file cannot be written (folder, permissions, disk full).
    """
    with atomic_path(final) as tmp:
        write_gpkg_layers_into(tmp, layers, crs, final=final)


def write_gpkg_layers_into(
    path: Path, layers: dict[str, gpd.GeoDataFrame], crs: CRS | str, *, final: Path
) -> None:
    """:func:`write_gpkg_layers` into ``path``, a temporary file of :func:`atomic_path` for
    ``final`` (named in error messages); the caller renames it when everything else is done."""
    for name, g in layers_in_crs(layers, crs).items():
        write_gpkg_layer(path, name, g, final=final)


def layers_in_crs(
    layers: dict[str, gpd.GeoDataFrame], crs: CRS | str
) -> dict[str, gpd.GeoDataFrame]:
    """Each layer reprojected to ``crs`` (a layer without a CRS is taken to be in it).

    Raises
    ------
    ConfigError
        ``crs`` is not a CRS pyproj knows.
    """
    try:
        target = CRS.from_user_input(crs)
    except CRSError as exc:
        raise ConfigError(
            f"output CRS {show_text(crs)} is not a CRS pyproj knows (outputs.crs): {one_line(exc)}"
        ) from None
    out = {}
    for name, g in layers.items():
        if g.crs is not None and target != g.crs:
            g = g.to_crs(target)
        elif g.crs is None:
            g = g.set_crs(target, allow_override=True)
        out[name] = g
    return out


def write_gpkg_layer(path: Path, name: str, g: gpd.GeoDataFrame, *, final: Path) -> None:
    """Add layer ``name`` (as it is, CRS included) to the GeoPackage at ``path``, a temporary
    file for ``final`` (named in error messages).

    Raises
    ------
    OutputError
        The file cannot be written (folder, permissions, disk full).
    """
    try:
        # through GDAL's Arrow batch writer: the same tables, ~25 % sooner than the
        # feature-by-feature writer (state benchmark's corridor layer: 1.18 s against 1.55 s).
        # A layer that mixes single and multi parts of one kind (the zones' polygons and
        # multipolygons) is written as multi parts, so that it declares one geometry type
        pyogrio.write_dataframe(
            g, path, layer=name, driver="GPKG", promote_to_multi=None, use_arrow=True
        )
    except pyogrio.errors.DataSourceError as exc:
        msg = one_line(exc)
        if "No space left" in msg or "disk full" in msg.lower():
            msg = "no space left on the device: the disk is full"
        raise OutputError(f"{final}: cannot write layer '{name}' ({msg})") from None
