"""Station-table ingest: every row is accepted or rejected with a reason, never lost."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import geopandas as gpd
import pytest
from shapely.geometry import LineString, MultiPoint, Point

from pipeline.errors import InputFileError
from pipeline.ingest import validate_stations
from pipeline.io import read_station_table

TODAY = dt.date(2026, 12, 1)
HEADER = (
    "station_id,name,operator,lon,lat,regular_aki,premium_aki,volume_l_per_month,"
    "last_inspection_date\n"
)
GOOD = "A1,Alpha,Op,-135.0,40.0,85,91,1000,2025-05-01\n"


def _ingest(tmp_path: Path, text: str | bytes, name: str = "st.csv", crs: str = "EPSG:4326"):
    p = tmp_path / name
    if isinstance(text, str):
        p.write_text(text, encoding="utf-8")
    else:
        p.write_bytes(text)
    table = read_station_table(p)
    res = validate_stations(table, source=str(p), default_crs=crs, today=TODAY)
    assert len(table.frame) == len(res.accepted) + len(res.rejected)  # the row invariant
    return res


def _reason(res) -> str:
    assert len(res.rejected) == 1, res.rejected
    return res.rejected["reject_reason"].iloc[0]


def test_good_row_accepted_with_point(tmp_path):
    res = _ingest(tmp_path, HEADER + GOOD)
    assert len(res.accepted) == 1 and len(res.rejected) == 0
    g = res.accepted.geometry.iloc[0]
    assert (g.x, g.y) == (-135.0, 40.0)
    assert res.accepted["regular_aki"].iloc[0] == 85.0


@pytest.mark.parametrize(
    ("row", "reason"),
    [
        ("B1,Beta,Op,,40.0,85,91,1000,2025-05-01\n", "missing lon"),
        ("B1,Beta,Op,abc,40.0,85,91,1000,2025-05-01\n", "lon is not a number"),
        ("B1,Beta,Op,-135,40,870,91,1000,2025-05-01\n", "looks like AKI × 10"),
        ("B1,Beta,Op,-135,40,8.7,91,1000,2025-05-01\n", "looks like AKI ÷ 10"),
        ("B1,Beta,Op,-135,40,85,91,-5,2025-05-01\n", "volume_l_per_month -5 outside"),
        ("B1,Beta,Op,-135,40,85,91,1000,2027-01-01\n", "after the run date"),
        ("B1,Beta,Op,-135,40,85,91,1000,01/02/2025x\n", "not a date"),
        ("B1,Beta,Op,40.0,-135.0,85,91,1000,2025-05-01\n", "look swapped"),
        ("B1,Beta,Op,-135,95,85,91,1000,2025-05-01\n", "out of range"),
        (",Beta,Op,-135,40,85,91,1000,2025-05-01\n", "empty station_id"),
        ("B1,Beta,Op,-135,40,85,83,1000,2025-05-01\n", "below regular_aki"),
    ],
)
def test_bad_rows_rejected_with_reason(tmp_path, row, reason):
    res = _ingest(tmp_path, HEADER + GOOD + row)
    assert len(res.accepted) == 1
    assert reason in _reason(res)
    # the rejected row keeps all its original text
    assert res.rejected["name"].iloc[0] == "Beta"


def test_longitude_0_360_is_unwrapped(tmp_path):
    res = _ingest(tmp_path, HEADER + "C1,Gamma,Op,225.0,40.0,85,91,1000,2025-05-01\n")
    assert res.accepted["lon"].iloc[0] == pytest.approx(-135.0)
    assert any("0–360" in n for n in res.notes)


def test_identical_duplicate_keeps_first(tmp_path):
    res = _ingest(tmp_path, HEADER + GOOD + GOOD)
    assert len(res.accepted) == 1
    assert "identical" in _reason(res)


def test_conflicting_duplicates_all_rejected(tmp_path):
    res = _ingest(tmp_path, HEADER + GOOD + GOOD.replace(",85,", ",87,"))
    assert len(res.accepted) == 0 and len(res.rejected) == 2
    assert res.rejected["reject_reason"].str.contains("conflicting").all()


def test_semicolon_decimal_comma_and_cp1252(tmp_path):
    text = ("station_id;name;lon;lat;regular_aki\nS1;Caf\u00e9 Nord;-135,5;40,25;85,5\n").encode(
        "cp1252"
    )
    res = _ingest(tmp_path, text)
    assert res.accepted["name"].iloc[0] == "Café Nord"
    assert res.accepted["lon"].iloc[0] == pytest.approx(-135.5)
    assert res.accepted["regular_aki"].iloc[0] == pytest.approx(85.5)


def test_bom_and_tab_delimiter(tmp_path):
    text = "\ufeffstation_id\tname\tlon\tlat\tregular_aki\nS1\tX\t-135\t40\t86\n"
    res = _ingest(tmp_path, text.encode("utf-8"))
    assert list(res.accepted["station_id"]) == ["S1"]


def test_aliases_for_coordinates(tmp_path):
    res = _ingest(tmp_path, "station_id,name,Longitude,Latitude,regular_aki\nS1,X,-135,40,86\n")
    assert len(res.accepted) == 1
    assert any("read as 'lon'" in n for n in res.notes)


def test_missing_required_column_is_a_file_error_with_hint(tmp_path):
    with pytest.raises(InputFileError, match=r"regular_aki.*regular_ak"):
        _ingest(tmp_path, "station_id,name,lon,lat,regular_ak\nS1,X,-135,40,86\n")


@pytest.mark.parametrize("text", ["", "   \n\n"])
def test_empty_file_is_a_file_error(tmp_path, text):
    with pytest.raises(InputFileError, match="empty"):
        _ingest(tmp_path, text)


def test_header_only_gives_zero_rows(tmp_path):
    res = _ingest(tmp_path, HEADER)
    assert len(res.accepted) == 0 and len(res.rejected) == 0


def test_projected_xy_columns(tmp_path):
    res = _ingest(
        tmp_path, "station_id,name,x,y,regular_aki\nS1,X,500000,4400000,86\n", crs="EPSG:32608"
    )
    assert res.accepted["lon"].iloc[0] == pytest.approx(-135.0, abs=1e-6)


def test_projected_crs_contradicted_by_degree_values(tmp_path):
    res = _ingest(tmp_path, "station_id,name,x,y,regular_aki\nS1,X,-135,40,86\n", crs="EPSG:32608")
    assert "look like degrees" in _reason(res)


def test_vector_input_with_mixed_geometries(tmp_path):
    gdf = gpd.GeoDataFrame(
        {
            "station_id": ["P1", "P2", "P3", "P4"],
            "name": ["a", "b", "c", "d"],
            "regular_aki": [85, 86, 87, 85],
        },
        geometry=[
            Point(-135, 40),
            MultiPoint([(-135, 40)]),
            MultiPoint([(-135, 40), (-134, 41)]),
            LineString([(0, 0), (1, 1)]),
        ],
        crs="EPSG:4326",
    )
    p = tmp_path / "st.gpkg"
    gdf.to_file(p, layer="stations", driver="GPKG")
    table = read_station_table(p)
    res = validate_stations(table, source=str(p), default_crs="EPSG:4326", today=TODAY)
    assert list(res.accepted["station_id"]) == ["P1", "P2"]
    reasons = " | ".join(res.rejected["reject_reason"])
    assert "several points" in reasons and "LineString" in reasons


def test_missing_file(tmp_path):
    with pytest.raises(InputFileError, match="not found"):
        read_station_table(tmp_path / "none.csv")
