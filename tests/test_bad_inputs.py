"""Catalogue of bad inputs a real user sends, each with its expected outcome.

Two kinds of outcome (see pipeline.ingest / pipeline.errors):

* a problem of one row -> that row lands in layer ``rejected_stations`` with a reason, the run
  goes on, and rows in = accepted + rejected (checked on the GeoPackage read back with GDAL);
* a problem of a file or of the config -> one clear message naming the file/row/key; through
  the real CLI: exit status 2, one line on stderr, no traceback.

Inputs are tiny and built here: a 20 x 20 GeoTIFF (EPSG:32608, 1 km cells, explicit transform
and nodata) over open ocean and a few CSV rows. Most cases run in-process through
``pipeline.stages.run``; a representative subset runs through ``python -m pipeline.cli run``.
Station names are invented. Expected values are plain consequences of the inputs (regression
values where a number is checked), not outside references.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pytest
import rasterio
from conftest import REPO
from pyproj import Transformer
from rasterio.transform import from_origin
from shapely.geometry import LineString, MultiPoint, Point

from pipeline.config import load_config
from pipeline.errors import AltigradeError, ConfigError, InputFileError
from pipeline.stages import run

# ----------------------------------------------------------------------------- fixtures

#: The tiny DEM: EPSG:32608, upper-left (490000, 4410000), 1 km cells, 20 x 20 — about
#: lon -135.12..-134.88, lat 39.66..39.84 (open Pacific, SCHEMA.md's demo area).
DEM_CRS = "EPSG:32608"
DEM_ORIGIN = (490_000.0, 4_410_000.0)
NODATA = -9999.0
#: The optional whole-DEM stages, off for speed unless a case is about them.
OFF = "[zones]\nenabled = false\n[corridors]\nenabled = false\n"
HEADER = (
    "station_id",
    "name",
    "operator",
    "lon",
    "lat",
    "regular_aki",
    "premium_aki",
    "volume_l_per_month",
    "last_inspection_date",
)
#: Three good rows inside the DEM (invented names).
GOOD = (
    ("ST-1", "Orvane Pumps", "Kelvadi Oil", "-135.00", "39.75", "85", "91", "1000", "2025-05-01"),
    ("ST-2", "Brisket Hollow Fuel", "Kelvadi Oil", "-135.05", "39.80", "87", "91", "2500", ""),
    ("ST-3", "Tamberlin Cross", "Ostrava Petrol", "-134.95", "39.70", "86", "", "", "2024-11-30"),
)


def make_dem(
    path: Path,
    *,
    crs: str | None = DEM_CRS,
    origin: tuple[float, float] = DEM_ORIGIN,
    res: float = 1000.0,
    n: int = 20,
    nodata: float | None = NODATA,
    fill: float | None = None,
    nodata_window: tuple[int, int, int, int] | None = None,
    units: str | None = None,
) -> Path:
    """A tiny single-band float32 GeoTIFF: z = 1000 + 50·col + 20·row [m] (or ``fill``)."""
    rows, cols = np.mgrid[0:n, 0:n]
    z = (1000.0 + 50.0 * cols + 20.0 * rows).astype("float32")
    if fill is not None:
        z[:] = fill
    if nodata_window is not None:
        r0, r1, c0, c1 = nodata_window
        z[r0:r1, c0:c1] = NODATA
    profile = dict(
        driver="GTiff",
        width=n,
        height=n,
        count=1,
        dtype="float32",
        transform=from_origin(origin[0], origin[1], res, res),
    )
    if crs is not None:
        profile["crs"] = crs
    if nodata is not None:
        profile["nodata"] = nodata
    with rasterio.open(path, "w", **profile) as ds:
        ds.write(z, 1)
        if units:
            ds.set_band_unit(1, units)
    return path


def dem_cell_of(lon: float, lat: float) -> tuple[int, int]:
    """(row, col) of the tiny DEM's cell holding a WGS 84 point."""
    x, y = Transformer.from_crs("EPSG:4326", DEM_CRS, always_xy=True).transform(lon, lat)
    return int((DEM_ORIGIN[1] - y) // 1000), int((x - DEM_ORIGIN[0]) // 1000)


def csv_text(rows, header=HEADER, delim: str = ",", end: str = "\n") -> str:
    """Rows joined as written (no quoting added: cases control every byte)."""
    lines = [delim.join(header)] + [delim.join(r) for r in rows]
    return end.join(lines) + end


def good_rows(**changes: dict[str, str]) -> list[list[str]]:
    """The three good rows, with ``{station_id: {column: value}}`` changes applied."""
    out = []
    for r in GOOD:
        r = list(r)
        for col, val in changes.get(r[0].replace("-", "_"), {}).items():
            r[HEADER.index(col)] = val
        out.append(r)
    return out


def write_config(
    folder: Path,
    *,
    stations: str = "stations.csv",
    dem: str = "dem.tif",
    inputs_extra: str = "",
    extra: str | None = None,
    name: str = "case",
) -> Path:
    extra = OFF if extra is None else extra
    p = folder / "run.toml"
    p.write_text(
        f'name = "{name}"\n[inputs]\nstations = "{stations}"\ndem = "{dem}"\n{inputs_extra}\n'
        f"{extra}",
        encoding="utf-8",
    )
    return p


def read_layers(out: Path) -> tuple[gpd.GeoDataFrame, gpd.GeoDataFrame]:
    """Layers ``stations`` and ``rejected_stations`` of ``altigrade.gpkg``, read with GDAL."""
    g = out / "altigrade.gpkg"
    return (
        pyogrio.read_dataframe(g, layer="stations"),
        pyogrio.read_dataframe(g, layer="rejected_stations"),
    )


def assert_rows_conserved(out: Path, rows_in: int) -> tuple[gpd.GeoDataFrame, gpd.GeoDataFrame]:
    """The invariant: every row read is in exactly one of the two layers."""
    st, rj = read_layers(out)
    assert len(st) + len(rj) == rows_in, (len(st), len(rj), rows_in)
    seen = [int(v) for v in st["source_row"]] + [int(v) for v in rj["source_row"]]
    assert len(seen) == len(set(seen)) == rows_in
    manifest = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
    assert manifest["counts"]["rows_in"] == rows_in
    if len(rj):
        assert (rj["reject_reason"].astype(str).str.len() > 5).all()
    return st, rj


# ------------------------------------------------------------------ row cases, one run


@dataclass(frozen=True)
class RowCase:
    """A row-level case in the standard layout (UTF-8, comma, the tiny DEM, lon/lat in WGS 84).

    ``lines`` are written as given (each may hold several physical lines); ``expect`` has one
    entry per line: "ok" (row accepted) or a fragment of its reject reason. All row cases share
    one station table and one run; each checks its own rows by line number.
    """

    id: str
    lines: tuple[str, ...]
    expect: tuple[str, ...]
    #: line index -> {column: value} expected in the stations layer
    values: dict[int, dict[str, object]] = field(default_factory=dict)
    #: fragments expected in the manifest (ingest notes)
    notes: tuple[str, ...] = ()


ROW_HEADER = HEADER + ("regular_share",)


def _line(sid: str, **changes: str) -> str:
    """A good row (like ST-1) with ``changes`` applied, in ROW_HEADER layout."""
    base = dict(zip(ROW_HEADER, (*GOOD[0], ""), strict=True))
    base.update({"station_id": sid, "name": f"Station {sid}", **changes})
    return ",".join(base[c] for c in ROW_HEADER)


ROW_CASES: list[RowCase] = [
    RowCase("good_rows", (_line("ok-1"), _line("ok-2", lon="-135.05", lat="39.80")), ("ok", "ok")),
    RowCase("lon_missing", (_line("lonmiss", lon=""),), ("missing lon",)),
    RowCase("lat_not_numeric", (_line("latnn", lat="39.7N"),), ("lat is not a number",)),
    RowCase("lon_infinite", (_line("loninf", lon="inf"),), ("lon is not a number",)),
    RowCase("lat_impossible", (_line("lat95", lat="95.5"),), ("out of range",)),
    RowCase("lonlat_swapped_row", (_line("swap", lon="39.75", lat="-135.0"),), ("look swapped",)),
    RowCase(
        "longitude_0_360",
        (_line("wrap", lon="225.0"),),
        ("ok",),
        values={0: {"lon": -135.0}},
        notes=("0–360",),
    ),
    RowCase(
        "projected_numbers_in_lonlat_columns",
        (_line("metres", lon="500000", lat="4400000"),),
        ("look like projected metres",),
    ),
    RowCase("station_outside_dem", (_line("far", lon="-120.0"),), ("outside the DEM",)),
    RowCase("duplicate_id_identical", (_line("dupi"), _line("dupi")), ("ok", "identical data")),
    RowCase(
        "duplicate_id_conflicting",
        (_line("dupc"), _line("dupc", regular_aki="87")),
        ("conflicting", "conflicting"),
    ),
    RowCase("aki_times_ten", (_line("aki870", regular_aki="870"),), ("AKI × 10",)),
    RowCase("aki_divided_by_ten", (_line("aki87", regular_aki="8.7"),), ("AKI ÷ 10",)),
    RowCase("aki_missing", (_line("akimiss", regular_aki=""),), ("missing regular_aki",)),
    RowCase("aki_not_numeric", (_line("akitxt", regular_aki="regular"),), ("not a number",)),
    RowCase(
        "aki_decimal_comma_in_comma_table",
        (_line("akicomma", regular_aki='"85,5"'),),
        ("decimal comma",),
    ),
    RowCase("premium_below_regular", (_line("prem", premium_aki="84"),), ("below regular_aki",)),
    RowCase(
        "negative_volume", (_line("negvol", volume_l_per_month="-5"),), ("volume_l_per_month -5",)
    ),
    RowCase("infinite_volume", (_line("infvol", volume_l_per_month="1e999"),), ("not a number",)),
    RowCase("share_as_percentage", (_line("pct", regular_share="75"),), ("percentage",)),
    RowCase(
        "date_in_future", (_line("future", last_inspection_date="2099-01-01"),), ("after the run",)
    ),
    RowCase(
        "date_not_a_date", (_line("baddate", last_inspection_date="31/02/2025"),), ("not a date",)
    ),
    RowCase("date_typo_year", (_line("y0205", last_inspection_date="0205-03-01"),), ("a typo",)),
    RowCase(
        "date_with_time_zone",
        (_line("tzdate", last_inspection_date="2025-05-01T08:00+02:00"),),
        ("ok",),
        values={0: {"last_inspection_date": "2025-05-01"}},
    ),
    RowCase("empty_station_id", (_line(""),), ("empty station_id",)),
    RowCase("empty_name", (_line("noname", name="   "),), ("empty name",)),
    RowCase(
        "unquoted_delimiter_in_value",
        (_line("shift", name="Hollow, North"),),
        ("fields, the header",),
    ),
    RowCase(
        "quote_spanning_lines",
        (_line("span", name='"Hollow\nNorth"'),),
        ("read as one row",),
    ),
    RowCase(
        "several_problems_in_one_row",
        (_line("many", lon="", regular_aki="870", last_inspection_date="2099-01-01"),),
        ("missing lon; regular_aki 870",),
    ),
]


@pytest.fixture(scope="module")
def row_run(tmp_path_factory) -> tuple[Path, dict[str, list[int]]]:
    """All row cases in one station table, run once in-process: (out, case id -> lines)."""
    folder = tmp_path_factory.mktemp("row-cases")
    text = ",".join(ROW_HEADER) + "\n"
    line_no = 2
    where: dict[str, list[int]] = {}
    for case in ROW_CASES:
        where[case.id] = []
        for ln in case.lines:
            where[case.id].append(line_no)
            text += ln + "\n"
            line_no += ln.count("\n") + 1
    (folder / "stations.csv").write_text(text, encoding="utf-8")
    make_dem(folder / "dem.tif")
    out = folder / "out"
    run(load_config(write_config(folder)), out)
    return out, where


def test_row_cases_conserve_every_row(row_run) -> None:
    out, where = row_run
    assert_rows_conserved(out, sum(len(v) for v in where.values()))


@pytest.mark.parametrize("case", ROW_CASES, ids=lambda c: c.id)
def test_row_case(case: RowCase, row_run) -> None:
    out, where = row_run
    st, rj = read_layers(out)
    accepted = st.set_index(st["source_row"].astype(int))
    rejected = rj.set_index(rj["source_row"].astype(int))
    for k, (line, expect) in enumerate(zip(where[case.id], case.expect, strict=True)):
        if expect == "ok":
            assert line in accepted.index, rejected.loc[[line], "reject_reason"].tolist()
        else:
            assert line in rejected.index, f"line {line} accepted, expected '{expect}'"
            reason = rejected.loc[line, "reject_reason"]
            assert expect in reason, reason
        for col, val in case.values.get(k, {}).items():
            got = accepted.loc[line, col]
            if isinstance(val, float | int):
                assert float(got) == pytest.approx(val, abs=1e-9), (col, got)
            else:
                assert got == val, (col, got)
    if case.notes:
        manifest = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
        text = json.dumps(manifest, ensure_ascii=False)
        for fragment in case.notes:
            assert fragment in text, fragment


def test_rejected_row_keeps_its_original_text(row_run) -> None:
    out, where = row_run
    _, rj = read_layers(out)
    row = rj[rj["source_row"].astype(int) == where["lat_not_numeric"][0]].iloc[0]
    assert row["lat"] == "39.7N" and row["name"] == "Station latnn"


# --------------------------------------------------------------- cases with their own run


@dataclass(frozen=True)
class Rows:
    """Row-level outcome of a whole run."""

    accepted: int
    #: station_id (or source_row as int) -> fragment of its reject reason
    rejected: dict[str | int, str] = field(default_factory=dict)
    #: fragments expected in the manifest (ingest notes)
    notes: tuple[str, ...] = ()
    #: station_id -> {column: value} expected in the stations layer
    values: dict[str, dict[str, object]] = field(default_factory=dict)


@dataclass(frozen=True)
class Fails:
    """File- or config-level outcome: one clear error naming the file/key."""

    kind: type[AltigradeError]
    fragments: tuple[str, ...]


Writer = Callable[[Path], object]


@dataclass(frozen=True)
class Case:
    id: str
    stations: str | bytes | Writer
    expect: Rows | Fails
    rows_in: int | None = None  # data rows written (default: counted from the CSV text)
    stations_name: str = "stations.csv"
    dem: Writer | None = None  # default: the tiny DEM
    inputs_extra: str = ""
    extra: str | None = None  # tables after [inputs] (default: OFF)
    config_text: str | bytes | None = None  # replaces the config entirely
    cli: bool = False  # also run through the real CLI
    xfail: str | None = None  # reason (strict): waits for a change in a file not owned here

    def build(self, folder: Path) -> Path:
        if callable(self.stations):
            self.stations(folder)
        elif isinstance(self.stations, bytes):
            (folder / self.stations_name).write_bytes(self.stations)
        else:
            (folder / self.stations_name).write_bytes(self.stations.encode("utf-8"))
        if self.dem is None:
            make_dem(folder / "dem.tif")
        else:
            self.dem(folder)
        if self.config_text is not None:
            p = folder / "run.toml"
            text = self.config_text
            p.write_bytes(text.encode("utf-8") if isinstance(text, str) else text)
            return p
        return write_config(
            folder, stations=self.stations_name, inputs_extra=self.inputs_extra, extra=self.extra
        )

    def expected_rows_in(self) -> int:
        if self.rows_in is not None:
            return self.rows_in
        assert isinstance(self.stations, str)
        return sum(1 for ln in self.stations.splitlines()[1:] if ln.strip())


def _vector_stations(folder: Path) -> None:
    gdf = gpd.GeoDataFrame(
        {
            "station_id": ["V1", "V2", "V3", "V4", "V5"],
            "name": ["Quillon Pumps", "Marrowgate", "Selvin Two-Point", "Lane Station", "Nowhere"],
            "regular_aki": [85.0, 86.0, 87.0, 85.0, 86.0],
        },
        geometry=[
            Point(-135.0, 39.75),
            MultiPoint([(-135.05, 39.80)]),
            MultiPoint([(-135.0, 39.75), (-134.95, 39.70)]),
            LineString([(-135.0, 39.7), (-134.9, 39.8)]),
            None,
        ],
        crs="EPSG:4326",
    )
    gdf.to_file(folder / "stations.gpkg", layer="stations", driver="GPKG")


def _vector_projected(folder: Path) -> None:
    pts = gpd.GeoSeries([Point(-135.0, 39.75), Point(-134.95, 39.70)], crs="EPSG:4326")
    gdf = gpd.GeoDataFrame(
        {"station_id": ["P1", "P2"], "name": ["Harrowby", "Cindral"], "regular_aki": [85, 86]},
        geometry=pts.to_crs(DEM_CRS),
    )
    gdf.to_file(folder / "stations.gpkg", layer="stations", driver="GPKG")


def _vector_crs_contradicted(folder: Path) -> None:
    # Degree numbers in a layer that declares UTM metres.
    gdf = gpd.GeoDataFrame(
        {"station_id": ["D1", "D2"], "name": ["Oxley", "Fenmarch"], "regular_aki": [85, 86]},
        geometry=[Point(-135.0, 39.75), Point(-134.95, 39.70)],
        crs=DEM_CRS,
    )
    gdf.to_file(folder / "stations.gpkg", layer="stations", driver="GPKG")


def _multilayer(with_stations: bool) -> Writer:
    def w(folder: Path) -> None:
        gdf = gpd.GeoDataFrame(
            {"station_id": ["M1"], "name": ["Corvel"], "regular_aki": [85]},
            geometry=[Point(-135.0, 39.75)],
            crs="EPSG:4326",
        )
        p = folder / "stations.gpkg"
        gdf.to_file(p, layer="stations" if with_stations else "pumps", driver="GPKG")
        gdf.to_file(p, layer="other", driver="GPKG", mode="a")

    return w


def _xlsx(folder: Path) -> None:
    df = pd.DataFrame([dict(zip(HEADER, r, strict=True)) for r in GOOD])
    pyogrio.write_dataframe(df, folder / "stations.xlsx", driver="XLSX")


def _roads_far_away(folder: Path) -> None:
    (folder / "stations.csv").write_text(csv_text(GOOD), encoding="utf-8")
    roads = gpd.GeoDataFrame(
        {
            "road_class": ["main"],
            "speed_kmh": [70.0],
            "aadt": [1200.0],
            "oneway": [False],
            "bridge": [False],
        },
        geometry=[LineString([(300_000, 4_300_000), (320_000, 4_310_000)])],
        crs=DEM_CRS,
    )
    roads.to_file(folder / "roads.gpkg", layer="roads", driver="GPKG")


def _dem_nodata_at_st2(folder: Path) -> None:
    r, c = dem_cell_of(-135.05, 39.80)
    make_dem(folder / "dem.tif", nodata_window=(max(r - 2, 0), r + 3, max(c - 2, 0), c + 3))


def _dem_lonlat(folder: Path) -> None:
    make_dem(folder / "dem.tif", crs="EPSG:4326", origin=(-135.2, 39.9), res=0.02)


#: A second tiny region where |lon| < 90 (South Atlantic, open ocean) for swap checks.
SOUTH = ((-30.0, -40.0), (-30.05, -39.95), (-29.95, -40.05), (-30.1, -40.1), (-29.9, -39.9))


def _dem_south(folder: Path) -> None:
    make_dem(folder / "dem.tif", crs="EPSG:4326", origin=(-30.2, -39.8), res=0.02)


def _south_rows(swap: set[int]) -> str:
    rows = []
    for k, (lon, lat) in enumerate(SOUTH):
        a, b = (lat, lon) if k in swap else (lon, lat)
        rows.append([f"SA-{k}", f"Pelagic {k}", "Op", f"{a}", f"{b}", "86", "", "", ""])
    return csv_text(rows)


def _truncated_dem(folder: Path) -> None:
    make_dem(folder / "full.tif", n=200, res=100.0)
    data = (folder / "full.tif").read_bytes()
    (folder / "dem.tif").write_bytes(data[: len(data) * 2 // 3])


def _corrupt_compressed_dem(folder: Path) -> None:
    """A DEFLATE-tiled GeoTIFF whose tile bytes are scrambled in place (size unchanged)."""
    make_dem(folder / "clean.tif", n=64, res=312.5)
    with rasterio.open(folder / "clean.tif") as src:
        profile = dict(src.profile, compress="deflate", tiled=True, blockxsize=16, blockysize=16)
        with rasterio.open(folder / "dem.tif", "w", **profile) as dst:
            dst.write(src.read(1), 1)
    with rasterio.open(folder / "dem.tif") as ds:
        tiles = [
            (int(ds.get_tag_item(f"BLOCK_OFFSET_{bx}_{by}", "TIFF", bidx=1)),
             int(ds.get_tag_item(f"BLOCK_SIZE_{bx}_{by}", "TIFF", bidx=1)))
            for by in range(4) for bx in range(4)
        ]  # fmt: skip
    data = bytearray((folder / "dem.tif").read_bytes())
    for off, n in tiles:
        for k in range(off + 2, off + n - 2):
            data[k] ^= 0x5A
    (folder / "dem.tif").write_bytes(bytes(data))


def _multiband_dem(folder: Path) -> None:
    with rasterio.open(
        folder / "dem.tif",
        "w",
        driver="GTiff",
        width=20,
        height=20,
        count=3,
        dtype="uint8",
        crs=DEM_CRS,
        transform=from_origin(*DEM_ORIGIN, 1000, 1000),
    ) as ds:
        ds.write(np.full((3, 20, 20), 200, dtype="uint8"))


def _stations_dir(folder: Path) -> None:
    (folder / "stations.csv").mkdir()


def _nothing(folder: Path) -> None:
    return None


BASE = csv_text(GOOD)
MINIMAL = "station_id,name,lon,lat,regular_aki\n"

CASES: list[Case] = [
    # ---- encodings and layouts that must simply work
    Case("good_baseline", BASE, Rows(3), cli=True),
    Case("utf8_bom", "\ufeff" + BASE, Rows(3)),
    Case(
        "cp1252",
        MINIMAL.encode() + "ST-1,Caf\u00e9 Nord \u20ac,-135.0,39.75,85\n".encode("cp1252"),
        Rows(1, values={"ST-1": {"name": "Caf\u00e9 Nord \u20ac"}}),
        rows_in=1,
    ),
    Case(
        "latin1",
        MINIMAL.encode() + "ST-1,\u00d1and\u00fa Alto,-135.0,39.75,85\n".encode("latin-1"),
        Rows(1, values={"ST-1": {"name": "\u00d1and\u00fa Alto"}}),
        rows_in=1,
    ),
    Case("utf16_bom", BASE.encode("utf-16"), Rows(3), rows_in=3),
    Case("utf16le_no_bom", BASE.encode("utf-16-le"), Rows(3, notes=("utf-16-le",)), rows_in=3),
    Case(
        "utf8_with_cp1252_lines",
        (MINIMAL + "ST-1,Gr\u00fcnwald \u00e9,-135.0,39.75,85\n").encode()
        + "ST-2,Caf\u00e9 Sud,-135.05,39.80,86\n".encode("cp1252"),
        Rows(
            2,
            notes=("Windows-1252",),
            values={"ST-1": {"name": "Gr\u00fcnwald \u00e9"}, "ST-2": {"name": "Caf\u00e9 Sud"}},
        ),
        rows_in=2,
    ),
    Case(
        "semicolon_decimal_comma",
        csv_text([[v.replace(".", ",") for v in r] for r in GOOD], delim=";"),
        Rows(3, values={"ST-2": {"lon": -135.05, "lat": 39.80}}),
    ),
    Case(
        "semicolon_mixed_decimal_marks",
        "station_id;name;lon;lat;regular_aki;volume_l_per_month\n"
        "ST-1;Orvane;-135,0;39,75;85;1200.5\nST-2;Brisket;-135,05;39,80;86;1.250\n",
        Rows(
            2, values={"ST-1": {"volume_l_per_month": 1200.5}, "ST-2": {"volume_l_per_month": 1250}}
        ),
    ),
    Case("tab_delimited", csv_text(GOOD, delim="\t"), Rows(3)),
    Case("pipe_delimited_crlf", csv_text(GOOD, delim="|", end="\r\n"), Rows(3)),
    Case("excel_sep_line", "sep=;\n" + csv_text(GOOD, delim=";"), Rows(3), rows_in=3),
    Case(
        "unicode_minus_and_space_thousands",
        "station_id;name;lon;lat;regular_aki;volume_l_per_month\n"
        "ST-1;Orvane;\u2212135,0;39,75;85;1\u00a0200\n",
        Rows(1, values={"ST-1": {"lon": -135.0, "volume_l_per_month": 1200}}),
    ),
    Case(
        "renamed_columns_aliases",
        "ID,Station Name,Longitude,Latitude,Regular\nST-1,Orvane,-135.0,39.75,85\n",
        Rows(1, notes=("read as 'lon'",)),
    ),
    Case(
        "trailing_empty_columns", MINIMAL.strip() + ",,\nST-1,Orvane,-135.0,39.75,85,,\n", Rows(1)
    ),
    Case(
        "reserved_column_names",
        "station_id,name,lon,lat,regular_aki,fid,source_row,geometry\n"
        "ST-1,Orvane,-135.0,39.75,85,x,y,z\n",
        Rows(1, notes=("input_fid",), values={"ST-1": {"input_fid": "x", "input_geometry": "z"}}),
    ),
    Case(
        "odd_column_names",
        MINIMAL.strip() + ',"a""b","x\ny",geom,GEOMETRY ,select,\x1b[2J,' + "q" * 200 + "\n"
        "ST-1,Orvane,-135.0,39.75,85,1,2,3,4,5,6,7\n",
        Rows(1, values={"ST-1": {"input_geom": "3", 'a"b': "1", "x\ny": "2"}}),
        rows_in=1,
    ),
    Case("xlsx_workbook", _xlsx, Rows(3), rows_in=3, stations_name="stations.xlsx"),
    Case(
        "truncated_last_line",
        BASE.rstrip("\n").rsplit(",", 4)[0],
        Rows(2, {"ST-3": "incomplete"}),
        rows_in=3,
    ),
    Case("header_only", csv_text([]), Rows(0), rows_in=0, cli=True),
    Case(
        "all_rows_rejected",
        csv_text(good_rows(**{k: {"lat": "99"} for k in ("ST_1", "ST_2", "ST_3")})),
        Rows(0, {"ST-1": "range", "ST-2": "range", "ST-3": "range"}),
    ),
    # ---- positions and CRSs
    Case(
        "lonlat_header_swapped",
        csv_text(GOOD, header=tuple({"lon": "lat", "lat": "lon"}.get(h, h) for h in HEADER)),
        Rows(0, {"ST-1": "swapped", "ST-2": "swapped", "ST-3": "swapped"}),
    ),
    Case(
        "lonlat_swapped_inside_90",
        _south_rows({2}),
        Rows(4, {"SA-2": "look swapped"}),
        dem=_dem_south,
    ),
    Case(
        "lonlat_swapped_whole_table_inside_90",
        _south_rows({0, 1, 2, 3, 4}),
        Rows(0, {f"SA-{k}": "swapped" for k in range(5)}),
        dem=_dem_south,
    ),
    Case(
        "declared_projected_crs_contradicted",
        BASE,
        Rows(0, {"ST-1": "look like degrees", "ST-2": "degrees", "ST-3": "degrees"}),
        inputs_extra='stations_crs = "EPSG:32608"',
    ),
    Case(
        "xy_columns_projected_crs",
        "station_id,name,x,y,regular_aki\nP-1,Harrowby,500000,4400000,85\n",
        Rows(1, values={"P-1": {"lon": -135.0}}),
        inputs_extra='stations_crs = "EPSG:32608"',
    ),
    Case("dem_nodata_at_station", BASE, Rows(2, {"ST-2": "no data"}), dem=_dem_nodata_at_st2),
    Case("dem_in_lonlat", BASE, Rows(3), dem=_dem_lonlat),
    Case(
        "dem_undeclared_nodata_value",
        BASE,
        Rows(0, {"ST-1": "elevation", "ST-2": "elevation", "ST-3": "elevation"}),
        dem=lambda f: make_dem(f / "dem.tif", nodata=None, fill=-9999.0),
    ),
    Case(
        "vector_mixed_and_multipart_geometry",
        _vector_stations,
        Rows(2, {"V3": "several points", "V4": "LineString", "V5": "missing geometry"}),
        rows_in=5,
        stations_name="stations.gpkg",
    ),
    Case(
        "vector_projected_layer",
        _vector_projected,
        Rows(2, values={"P1": {"lon": -135.0}}),
        rows_in=2,
        stations_name="stations.gpkg",
    ),
    Case(
        "vector_declared_crs_contradicted",
        _vector_crs_contradicted,
        Rows(0, {"D1": "look like degrees", "D2": "look like degrees"}),
        rows_in=2,
        stations_name="stations.gpkg",
    ),
    Case(
        "vector_multilayer_with_stations_layer",
        _multilayer(True),
        Rows(1),
        rows_in=1,
        stations_name="stations.gpkg",
    ),
    Case(
        "roads_miss_the_stations",
        _roads_far_away,
        Rows(3),
        rows_in=3,
        inputs_extra='roads = "roads.gpkg"',
        extra='[zones]\nenabled = false\n[corridors]\ndestinations = "stations"\n',
    ),
    # ---- file-level problems of the station table
    Case(
        "missing_required_column",
        BASE.replace("regular_aki", "regular_ak", 1),
        Fails(InputFileError, ("stations.csv", "regular_aki", "regular_ak")),
        cli=True,
    ),
    Case(
        "no_position_columns",
        "station_id,name,regular_aki\nST-1,Orvane,85\n",
        Fails(InputFileError, ("stations.csv", "lon/lat")),
    ),
    Case(
        "duplicate_column_names",
        "station_id,name,lon,lat,regular_aki,name\nST-1,a,-135,39.75,85,b\n",
        Fails(InputFileError, ("stations.csv", "duplicate column names", "name")),
    ),
    Case(
        "columns_meaning_the_same",
        "station_id,name,Lat,lat,lon,regular_aki\nST-1,a,39.75,39.75,-135,85\n",
        Fails(InputFileError, ("stations.csv", "'Lat'", "'lat'", "both mean")),
    ),
    Case("empty_file", "", Fails(InputFileError, ("stations.csv", "empty")), cli=True),
    Case("blank_lines_only", "\n  \r\n\t\n", Fails(InputFileError, ("stations.csv", "empty"))),
    Case(
        "quote_never_closed",
        BASE + 'ST-4,"Unclosed,Op,-135.0,39.75,85,,,\nST-5,Later,Op,-135.0,39.75,85,,,\n',
        Fails(InputFileError, ("stations.csv", "line 5", "never closed")),
        cli=True,
    ),
    Case(
        "binary_png_as_table",
        b"\x89PNG\r\n\x1a\n" + bytes(range(256)) * 4,
        Fails(InputFileError, ("stations.csv", "PNG")),
    ),
    Case(
        "xlsx_named_csv",
        b"PK\x03\x04\x14\x00\x00\x00" + b"\x00" * 200,
        Fails(InputFileError, ("stations.csv", "ZIP", "xlsx")),
    ),
    Case(
        "binary_noise_as_table",
        bytes((i * 37 + 11) % 256 for i in range(3000)),
        Fails(InputFileError, ("stations.csv", "binary")),
    ),
    Case(
        "directory_as_station_file",
        _stations_dir,
        Fails(InputFileError, ("stations.csv", "folder")),
        cli=True,
    ),
    Case("station_file_missing", _nothing, Fails(InputFileError, ("stations.csv", "not found"))),
    Case(
        "vector_multilayer_ambiguous",
        _multilayer(False),
        Fails(InputFileError, ("stations.gpkg", "inputs.stations_layer", "pumps")),
        stations_name="stations.gpkg",
    ),
    # ---- file-level problems of the DEM
    Case("dem_missing", BASE, Fails(InputFileError, ("dem.tif", "not found")), dem=_nothing),
    Case(
        "dem_is_a_directory",
        BASE,
        Fails(InputFileError, ("dem.tif", "folder")),
        dem=lambda f: (f / "dem.tif").mkdir(),
    ),
    Case(
        "dem_without_crs",
        BASE,
        Fails(InputFileError, ("dem.tif", "no CRS")),
        dem=lambda f: make_dem(f / "dem.tif", crs=None),
    ),
    Case(
        "dem_truncated_geotiff",
        BASE,
        Fails(InputFileError, ("dem.tif", "truncated")),
        dem=_truncated_dem,
        cli=True,
    ),
    Case(
        "dem_not_a_raster",
        BASE,
        Fails(InputFileError, ("dem.tif", "cannot open as a raster")),
        dem=lambda f: (f / "dem.tif").write_text("elevation,1200\n", encoding="utf-8"),
    ),
    Case(
        "dem_corrupt_compressed_tiles",
        BASE,
        Fails(InputFileError, ("dem.tif", "damaged")),
        dem=_corrupt_compressed_dem,
    ),
    Case("dem_rgb_image", BASE, Fails(InputFileError, ("dem.tif", "3 bands")), dem=_multiband_dem),
    Case(
        "dem_in_feet",
        BASE,
        Fails(InputFileError, ("dem.tif", "feet")),
        dem=lambda f: make_dem(f / "dem.tif", units="ft"),
    ),
    Case(
        "roads_file_missing",
        BASE,
        Fails(InputFileError, ("roads.gpkg", "not found")),
        inputs_extra='roads = "roads.gpkg"',
    ),
    # ---- config problems
    Case(
        "config_key_typo",
        BASE,
        Fails(ConfigError, ("run.toml", "zones.resolution", "did you mean")),
        extra="[zones]\nenabled = false\nresolution = 900\n[corridors]\nenabled = false\n",
        cli=True,
    ),
    Case(
        "config_humidity_3000_pct",
        BASE,
        Fails(ConfigError, ("run.toml", "design_day.relative_humidity_pct")),
        extra=OFF + "[design_day]\nrelative_humidity_pct = 3000\n",
        cli=True,
    ),
    Case(
        "config_wrong_type",
        BASE,
        Fails(ConfigError, ("run.toml", "zones.resolution_m")),
        extra='[zones]\nresolution_m = "fine"\n',
    ),
    Case(
        "config_unknown_stations_crs",
        BASE,
        Fails(ConfigError, ("inputs.stations_crs", "EPSG:99999")),
        inputs_extra='stations_crs = "EPSG:99999"',
        cli=True,
    ),
    Case(
        "config_unknown_output_crs",
        BASE,
        Fails(ConfigError, ("outputs.crs", "nonsense")),
        extra=OFF + '[outputs]\ncrs = "nonsense"\n',
    ),
    Case(
        "config_not_toml",
        BASE,
        Fails(ConfigError, ("run.toml", "not valid TOML")),
        config_text="name = = 3\n",
    ),
    Case(
        "config_not_utf8",
        BASE,
        Fails(ConfigError, ("run.toml", "not UTF-8")),
        config_text=b"name = '\xff'\n",
    ),
    Case(
        "config_missing_dem_key",
        BASE,
        Fails(ConfigError, ("run.toml", "inputs.dem")),
        config_text='name = "x"\n[inputs]\nstations = "stations.csv"\n',
    ),
    Case(
        "config_demo_placeholder_outside_demo",
        BASE,
        Fails(ConfigError, ("run.toml", "inputs.stations", "{demo}")),
        config_text='name = "x"\n[inputs]\nstations = "{demo}/stations.csv"\ndem = "dem.tif"\n',
    ),
    Case(
        "config_infinite_resolution",
        BASE,
        Fails(ConfigError, ("run.toml", "zones.resolution_m")),
        extra="[zones]\nresolution_m = inf\n[corridors]\nenabled = false\n",
    ),
]


def _params(cases):
    out = []
    for c in cases:
        marks = [pytest.mark.xfail(reason=c.xfail, strict=True)] if c.xfail else []
        out.append(pytest.param(c, id=c.id, marks=marks))
    return out


def _check_rows(case: Case, out: Path) -> None:
    exp = case.expect
    assert isinstance(exp, Rows)
    st, rj = assert_rows_conserved(out, case.expected_rows_in())
    shown = rj[["station_id", "reject_reason"]].to_string()
    assert len(st) == exp.accepted, shown
    assert len(rj) == len(exp.rejected), shown
    for key, fragment in exp.rejected.items():
        col = "source_row" if isinstance(key, int) else "station_id"
        hit = rj[rj[col].astype(str) == str(key)]
        assert len(hit) == 1, f"{key} not rejected: {shown}"
        assert fragment in hit["reject_reason"].iloc[0], hit["reject_reason"].iloc[0]
    if exp.notes:
        manifest = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
        text = json.dumps(manifest, ensure_ascii=False)
        for fragment in exp.notes:
            assert fragment in text, fragment
    for sid, values in exp.values.items():
        row = st[st["station_id"] == sid]
        assert len(row) == 1, sid
        for col, val in values.items():
            got = row[col].iloc[0]
            if isinstance(val, float | int):
                assert float(got) == pytest.approx(val, abs=1e-9), (col, got)
            else:
                assert got == val, (col, got)


@pytest.mark.parametrize("case", _params(CASES))
def test_case_in_process(case: Case, tmp_path: Path) -> None:
    cfg_path = case.build(tmp_path)
    out = tmp_path / "out"
    if isinstance(case.expect, Fails):
        with pytest.raises(case.expect.kind) as err:
            run(load_config(cfg_path), out)
        msg = str(err.value)
        assert "\n" not in msg, msg
        for fragment in case.expect.fragments:
            assert fragment in msg, (fragment, msg)
        assert not (out / "altigrade.gpkg").exists()  # nothing is published
    else:
        run(load_config(cfg_path), out)
        _check_rows(case, out)


CLI_CASES = [c for c in CASES if c.cli]


@pytest.fixture(scope="module")
def cli_runs(tmp_path_factory) -> dict[str, tuple[subprocess.CompletedProcess, Path]]:
    """Every CLI case through ``python -m pipeline.cli run``, a few processes at a time."""
    procs = {}
    results = {}
    pending = list(CLI_CASES)
    limit = max(2, min(4, os.cpu_count() or 2))
    while pending or procs:
        while pending and len(procs) < limit:
            case = pending.pop(0)
            folder = tmp_path_factory.mktemp(f"cli-{case.id}")
            cfg = case.build(folder)
            out = folder / "out"
            p = subprocess.Popen(
                [sys.executable, "-m", "pipeline.cli", "run", str(cfg), "--out", str(out)],
                cwd=REPO,
                stdout=subprocess.PIPE,
                stderr=subprocess.PIPE,
                text=True,
            )
            procs[case.id] = (p, out)
        done = [cid for cid, (p, _) in procs.items() if p.poll() is not None]
        for cid in done:
            p, out = procs.pop(cid)
            stdout, stderr = p.communicate()
            results[cid] = (subprocess.CompletedProcess(p.args, p.returncode, stdout, stderr), out)
        if not done:
            time.sleep(0.05)
    return results


@pytest.mark.parametrize("case", _params(CLI_CASES))
def test_case_through_cli(case: Case, cli_runs) -> None:
    proc, out = cli_runs[case.id]
    assert "Traceback" not in proc.stderr, proc.stderr
    if isinstance(case.expect, Fails):
        assert proc.returncode == 2, proc.stdout + proc.stderr
        lines = proc.stderr.strip().splitlines()
        assert len(lines) == 1, proc.stderr
        assert lines[0].startswith("altigrade: error: ")
        for fragment in case.expect.fragments:
            assert fragment in lines[0], (fragment, lines[0])
    else:
        assert proc.returncode == 0, proc.stderr
        assert proc.stderr.strip() == ""
        _check_rows(case, out)


def test_catalogue_size_and_both_outcomes_present() -> None:
    """The brief asks for >= 40 cases, both outcome kinds, and a CLI subset."""
    assert len(CASES) + len(ROW_CASES) >= 40
    assert {type(c.expect) for c in CASES} == {Rows, Fails}
    ids = [c.id for c in CASES] + [c.id for c in ROW_CASES]
    assert len(set(ids)) == len(ids)
    assert len(CLI_CASES) >= 8
