"""The demo, end to end, at reduced size: real CLI process, GeoPackage read back with GDAL."""

from __future__ import annotations

import csv
import json

import pyogrio
import pytest
from conftest import run_cli
from pyproj import CRS


def _csv_rows(path) -> int:
    with open(path, encoding="utf-8", newline="") as f:
        return sum(1 for _ in csv.DictReader(f))


def test_demo_writes_geopackage_map_and_manifest(small_demo_run):
    out, proc = small_demo_run
    for name in ("altigrade.gpkg", "map.html", "manifest.json", "stations.csv"):
        assert (out / name).is_file(), name
    assert "planning aid" in proc.stdout


def test_geopackage_layers_columns_and_crs(small_demo_run):
    out, _ = small_demo_run
    layers = {name for name, _ in pyogrio.list_layers(out / "altigrade.gpkg")}
    assert {"stations", "rejected_stations"} <= layers
    info = pyogrio.read_info(out / "altigrade.gpkg", layer="stations")
    assert CRS.from_user_input(info["crs"]) == CRS.from_epsg(4326)
    cols = set(info["fields"])
    for c in (
        "station_id",
        "name",
        "elevation_m",
        "elevation_status",
        "pressure_kpa",
        "pressure_psi",
        "design_temperature_c",
        "humidity_ratio_g_per_kg",
        "regular_aki",
    ):
        assert c in cols, c
    assert info["geometry_type"] == "Point"
    for c in (
        "fleet_zone",
        "fleet_share_legacy",
        "justified_aki",
        "justified_aki_p05",
        "justified_aki_p95",
        "regular_share_satisfied_pct",
        "regular_break_even_elevation_m",
        "verdict",
        "verdict_reason",
    ):
        assert c in cols, c
    zinfo = pyogrio.read_info(out / "altigrade.gpkg", layer="justified_zones")
    assert zinfo["features"] >= 2 and "band_label" in zinfo["fields"]
    # every layer declares one geometry type (OGC GeoPackage 1.3, gpkg_geometry_columns:
    # a layer of polygons and multipolygons is written as multipolygons, not as the generic
    # GEOMETRY that GDAL reads back as "Unknown")
    declared = dict(pyogrio.list_layers(out / "altigrade.gpkg"))
    assert "Unknown" not in declared.values(), declared
    assert declared["justified_zones"] == "MultiPolygon"


def test_row_accounting_rows_in_equal_accepted_plus_rejected(small_demo_run, small_demo_inputs):
    out, _ = small_demo_run
    rows_in = _csv_rows(small_demo_inputs / "stations.csv")
    st = pyogrio.read_dataframe(out / "altigrade.gpkg", layer="stations")
    rj = pyogrio.read_dataframe(out / "altigrade.gpkg", layer="rejected_stations")
    assert rows_in == len(st) + len(rj)
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["counts"]["rows_in"] == rows_in
    # every source row appears exactly once across the two layers
    seen = sorted(list(st["source_row"]) + list(rj["source_row"].astype(int)))
    assert len(seen) == len(set(seen)) == rows_in


def test_demo_bad_rows_are_rejected_with_reasons(small_demo_run):
    out, _ = small_demo_run
    rj = pyogrio.read_dataframe(out / "altigrade.gpkg", layer="rejected_stations")
    bad = rj[rj["station_id"].str.startswith("ST-BAD")]
    assert len(bad) >= 7
    assert (bad["reject_reason"].str.len() > 5).all()
    text = " | ".join(bad["reject_reason"])
    for fragment in (
        "missing lat",
        "not a number",
        "AKI × 10",
        "volume_l_per_month",
        "conflicting",
        "outside the DEM",
        "after the run date",
    ):
        assert fragment in text, fragment


def test_elevations_and_pressures_are_physical(small_demo_run):
    """Demo relief spec: plain 200–500 m up to passes near 3,300 m; pressure by USSA 1976."""
    out, _ = small_demo_run
    st = pyogrio.read_dataframe(out / "altigrade.gpkg", layer="stations")
    assert st["elevation_m"].between(100, 3500).all()
    hi = st.loc[st["elevation_m"].idxmax()]
    lo = st.loc[st["elevation_m"].idxmin()]
    assert hi["pressure_kpa"] < lo["pressure_kpa"]


def test_high_stations_get_lower_justified_aki(small_demo_run):
    """Behaviour the fleet model must show (docs/requirement_model.md): relief with altitude."""
    out, _ = small_demo_run
    st = pyogrio.read_dataframe(out / "altigrade.gpkg", layer="stations")
    low = st[st["elevation_m"] < 600]["justified_aki_unrounded"]
    high = st[st["elevation_m"] > 2300]["justified_aki_unrounded"]
    assert len(low) and len(high)
    assert high.max() < low.min()
    assert (st["justified_aki_p05"] <= st["justified_aki_unrounded"] + 1e-9).all()
    assert (st["justified_aki_p95"] >= st["justified_aki_unrounded"] - 1e-9).all()
    assert st["verdict_reason"].str.contains("AKI").all()


def test_corridors_layer_and_station_export_columns(small_demo_run):
    """Issue C behaviour on the demo: only sub-standard regular exports corridor risk."""
    out, _ = small_demo_run
    layers = {name for name, _ in pyogrio.list_layers(out / "altigrade.gpkg")}
    assert "corridors" in layers
    cor = pyogrio.read_dataframe(out / "altigrade.gpkg", layer="corridors")
    assert len(cor) and (cor["risk_l_aki_per_month"] >= 0).all()
    assert set(cor["direction"]) <= {"forward", "reverse", "both"}
    st = pyogrio.read_dataframe(out / "altigrade.gpkg", layer="stations")
    std = st[st["regular_aki"] >= 87]
    assert (std["export_risk_l_aki_per_month"].fillna(0) == 0).all()
    sub = st[(st["regular_aki"] < 87) & (st["corridor_status"] == "source")]
    assert len(sub) and (sub["export_risk_l_aki_per_month"] > 0).any()
    assert sub["corridor_required_aki"].between(85, 87).all()


def test_decision_outputs_answer_the_two_questions(small_demo_run):
    """Issue D: "which stations do we inspect next week, in what order?" and "which stations
    must move to 87 and what does it cost?" — answered from the output files alone."""
    import pandas as pd

    out, _ = small_demo_run
    plan = pd.read_csv(out / "inspection_plan.csv")
    visits = plan[plan["kind"] == "visit"]
    assert len(visits) and visits["station_id"].is_unique
    assert {"day", "stop_order", "leg_km", "cumulative_km", "reason"} <= set(plan.columns)
    for _, day in visits.groupby("day"):
        assert list(day["stop_order"]) == sorted(day["stop_order"])
    pri = pd.read_csv(out / "inspection_priorities.csv")
    assert list(pri["rank"]) == sorted(pri["rank"])
    comp = [c for c in pri.columns if c.startswith("score_")]
    assert (pri[comp].sum(axis=1) - pri["score"]).abs().max() < 0.05
    sp = pd.read_csv(out / "supply_plan.csv")
    raise_ = sp[sp["change"] == "raise"]
    assert (raise_["recommended_regular_aki"] > raise_["regular_aki"]).all()
    tot = pd.read_csv(out / "supply_totals.csv")
    all_row = tot[tot["grouping"] == "all"].iloc[0]
    assert all_row["incremental_cost_usd_per_month"] == pytest.approx(
        sp["incremental_cost_usd_per_month"].fillna(0).sum(), rel=1e-9
    )
    for f in ("map.html", "map_distributor.html", "map_public.html", "report.html"):
        assert (out / f).is_file()


def test_compare_two_runs(small_demo_run, tmp_path):
    out, _ = small_demo_run
    proc = run_cli("compare", str(out), str(out), "--out", str(tmp_path / "cmp"))
    assert proc.returncode == 0, proc.stderr
    assert "0 of" in proc.stdout
    for f in ("compare.html", "compare.gpkg", "station_changes.csv"):
        assert (tmp_path / "cmp" / f).is_file()
    bad = run_cli("compare", str(tmp_path), str(out))
    assert bad.returncode == 2 and "not an altigrade run folder" in bad.stderr


def test_manifest_records_inputs_versions_timings(small_demo_run):
    out, _ = small_demo_run
    m = json.loads((out / "manifest.json").read_text())
    assert set(m["inputs_sha256"]) and all(len(h) == 64 for h in m["inputs_sha256"].values())
    assert "numpy" in m["package_versions"] and "GDAL (rasterio)" in m["package_versions"]
    assert {"ingest", "terrain", "atmosphere", "publish"} <= set(m["timings_s"])


def test_second_run_reuses_unchanged_stages(small_demo_run, demo_cache, tmp_path):
    out, _ = small_demo_run
    proc = run_cli(
        "demo",
        "--cells",
        "250",
        "--stations",
        "40",
        "--out",
        str(out),
        "--cache-dir",
        str(demo_cache),
    )
    assert proc.returncode == 0, proc.stderr
    m = json.loads((out / "manifest.json").read_text())
    assert {"ingest", "terrain", "atmosphere"} <= set(m["stages_reused"])


def test_validate_command(small_demo_inputs, tmp_path):
    cfg = tmp_path / "run.toml"
    cfg.write_text(
        f'name = "v"\n[inputs]\nstations = "{small_demo_inputs / "stations.csv"}"\n'
        f'dem = "{small_demo_inputs / "dem.tif"}"\n',
        encoding="utf-8",
    )
    proc = run_cli("validate", str(cfg))
    assert proc.returncode == 0, proc.stderr
    assert "would be rejected" in proc.stdout
    assert not (tmp_path / "outputs").exists()


@pytest.mark.parametrize(
    ("body", "fragment"),
    [
        ('[inputs]\nstations = "nope.csv"\ndem = "nope.tif"\n', "nope.csv: station file not found"),
        ('[inputs]\nstations = "s.csv"\ndem = "d.tif"\n[zones]\nresolution = 3\n', "did you mean"),
    ],
)
def test_bad_config_exits_2_with_one_line(tmp_path, body, fragment):
    cfg = tmp_path / "run.toml"
    cfg.write_text(body, encoding="utf-8")
    proc = run_cli("run", str(cfg), "--out", str(tmp_path / "o"))
    assert proc.returncode == 2
    assert fragment in proc.stderr
    assert "Traceback" not in proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1


def test_help_mentions_commands_and_caution():
    proc = run_cli("--help")
    assert proc.returncode == 0
    for word in ("demo", "run", "validate", "planning aid"):
        assert word in proc.stdout


def test_corridors_without_a_road_layer_use_dem_derived_roads(small_demo_inputs, tmp_path):
    """Issue C fallback: no road layer → least-cost roads over the DEM carry the corridors."""
    import json

    d = small_demo_inputs
    cfg = tmp_path / "noroads.toml"
    cfg.write_text(
        f'name = "noroads"\n[inputs]\nstations = "{d / "stations.csv"}"\ndem = "{d / "dem.tif"}"\n'
        f'towns = "{d / "towns.gpkg"}"\n[corridors]\nsnap_distance_m = 5000.0\n'
        "fallback_grid_cells = 120\n[zones]\nenabled = false\n",
        encoding="utf-8",
    )
    proc = run_cli("run", str(cfg), "--out", str(tmp_path / "o"))
    assert proc.returncode == 0, proc.stderr
    m = json.loads((tmp_path / "o" / "manifest.json").read_text())
    assert m["counts"]["road_source"].startswith("derived from the DEM")
    st = pyogrio.read_dataframe(tmp_path / "o" / "altigrade.gpkg", layer="stations")
    assert (st["corridor_status"] != "not_on_road_network").any()


def test_run_date_is_pinned_and_checked(small_demo_inputs, tmp_path):
    cfg = tmp_path / "run.toml"
    cfg.write_text(
        f'name = "v"\n[inputs]\nstations = "{small_demo_inputs / "stations.csv"}"\n'
        f'dem = "{small_demo_inputs / "dem.tif"}"\n',
        encoding="utf-8",
    )
    bad = run_cli("--run-date", "2026-13-40", "validate", str(cfg))
    assert bad.returncode == 2 and "ALTIGRADE_RUN_DATE" in bad.stderr
    # an early run date turns the demo's recent inspection dates into future dates
    early = run_cli("--run-date", "2023-01-01", "validate", str(cfg))
    late = run_cli("--run-date", "2026-12-01", "validate", str(cfg))
    assert early.returncode == late.returncode == 0
    assert early.stdout.count("after the run date") > late.stdout.count("after the run date")
