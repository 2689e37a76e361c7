"""The GeoPackage written by a child process equals the one written in the run's process.

Reference: the in-process writer (:func:`pipeline.io.write_gpkg_layers_into`, GDAL's GPKG
driver through pyogrio). Both files are read back table by table with SQLite (every row of
every table, GeoPackage metadata included) and with GDAL (pyogrio), so a difference in a
column type, a value, a geometry or the spatial reference shows.
"""

from __future__ import annotations

import json
import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pytest
from conftest import REPO
from shapely.geometry import LineString, Point

from pipeline import io
from pipeline.errors import OutputError
from pipeline.layer_writer import write_gpkg_layers_in_child


def sqlite_rows(path: Path) -> dict[str, list]:
    """Every row of every table; gpkg_contents without its last_change time stamp."""
    con = sqlite3.connect(path)
    try:
        names = [r[0] for r in con.execute("select name from sqlite_master where type='table'")]
        out = {}
        for t in sorted(names):
            rows = con.execute(f'select * from "{t}"').fetchall()
            if t == "gpkg_contents":
                cols = [d[1] for d in con.execute("pragma table_info(gpkg_contents)")]
                k = cols.index("last_change")
                rows = [r[:k] + r[k + 1 :] for r in rows]
            out[t] = sorted(rows, key=repr)
            out[f"schema:{t}"] = con.execute(
                "select sql from sqlite_master where name = ?", (t,)
            ).fetchone()
        return out
    finally:
        con.close()


def varied_layers() -> dict[str, gpd.GeoDataFrame]:
    """Points in a projected CRS (reprojected on writing), lines, an empty layer; columns of
    booleans, integers, floats with NaN, text with missing values; a non-default index."""
    pts = gpd.GeoDataFrame(
        {
            "station_id": ["S1", "S2", None],
            "count": np.array([3, 0, -7], dtype=np.int64),
            "aki": [85.5, np.nan, 91.0],
            "open": [True, False, True],
        },
        geometry=[Point(500_000, 4_400_000), Point(510_000, 4_410_000), None],
        crs="EPSG:32613",
        index=[10, 20, 30],
    )
    lines = gpd.GeoDataFrame(
        {"flow_l_per_month": [1.5e6, 0.0], "road_class": ["primary", "track"]},
        geometry=[LineString([(-105.0, 39.0), (-105.1, 39.2)]), LineString([(0, 0), (1, 1)])],
        crs="EPSG:4326",
    )
    empty = gpd.GeoDataFrame({"name": pd.Series([], dtype=object)}, geometry=[], crs="EPSG:4326")
    return {"stations": pts, "corridors": lines, "nothing": empty}


def test_the_child_writes_the_same_geopackage_as_the_run_process(tmp_path):
    layers = varied_layers()
    here, child = tmp_path / "here.gpkg", tmp_path / "child.gpkg"
    io.write_gpkg_layers_into(here, layers, "EPSG:4326", final=tmp_path / "out.gpkg")
    assert write_gpkg_layers_in_child(child, layers, "EPSG:4326", final=tmp_path / "out.gpkg")
    assert sqlite_rows(child) == sqlite_rows(here)
    for name in layers:
        a = pyogrio.read_dataframe(here, layer=name)
        b = pyogrio.read_dataframe(child, layer=name)
        pd.testing.assert_frame_equal(pd.DataFrame(a), pd.DataFrame(b))
    # the reprojection happened: a UTM 13N point now in degrees (EPSG:32613 → 4326)
    st = pyogrio.read_dataframe(child, layer="stations")
    assert -106.0 < st.geometry.iloc[0].x < -104.0 and 39.0 < st.geometry.iloc[0].y < 40.5


def test_a_column_arrow_cannot_hold_is_written_in_this_process(tmp_path):
    odd = gpd.GeoDataFrame(
        {"mixed": [1, "two"]}, geometry=[Point(0, 0), Point(1, 1)], crs="EPSG:4326"
    )
    here, child = tmp_path / "here.gpkg", tmp_path / "child.gpkg"
    io.write_gpkg_layers_into(here, {"odd": odd}, "EPSG:4326", final=here)
    assert write_gpkg_layers_in_child(child, {"odd": odd}, "EPSG:4326", final=here) is False
    assert sqlite_rows(child) == sqlite_rows(here)


def test_a_file_the_child_cannot_write_raises_an_output_error_naming_the_output(tmp_path):
    final = tmp_path / "outputs" / "altigrade.gpkg"
    with pytest.raises(OutputError) as err:
        write_gpkg_layers_in_child(
            tmp_path / "no-such-folder" / "x.gpkg", varied_layers(), "EPSG:4326", final=final
        )
    assert str(final) in str(err.value) and "cannot write layer" in str(err.value)
    assert "Traceback" not in str(err.value)


def test_a_child_whose_parent_is_not_the_one_named_writes_nothing(tmp_path):
    layer = tmp_path / "l.arrow"
    varied_layers()["corridors"].to_feather(layer)
    out = tmp_path / "x.gpkg"
    job = tmp_path / "job.json"
    job.write_text(
        json.dumps({"path": str(out), "final": str(out), "layers": {"c": str(layer)}, "parent": 1}),
        encoding="utf-8",
    )
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    proc = subprocess.run(
        [sys.executable, "-m", "pipeline.layer_writer", str(job)],
        env=env,
        capture_output=True,
        timeout=120,
    )
    assert proc.returncode == 1
    assert not out.exists()


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="PR_SET_PDEATHSIG is Linux's")
def test_the_child_dies_with_its_parent(tmp_path):
    """Real processes: a parent starts a child that asks to die with it, then is killed."""
    pid_file = tmp_path / "child.pid"
    child_code = (
        "import os, sys, time\n"
        "from pipeline.layer_writer import _die_with_parent\n"
        "assert _die_with_parent(os.getppid())\n"
        f"open({str(pid_file)!r}, 'w').write(str(os.getpid()))\n"
        "time.sleep(120)\n"
    )
    parent_code = (
        "import subprocess, sys, time\n"
        f"subprocess.Popen([sys.executable, '-c', {child_code!r}])\n"
        "time.sleep(120)\n"
    )
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    parent = subprocess.Popen([sys.executable, "-c", parent_code], env=env)
    try:
        deadline = time.monotonic() + 60
        while not (pid_file.exists() and pid_file.read_text()):
            assert time.monotonic() < deadline, "the child never started"
            time.sleep(0.05)
        child_pid = int(pid_file.read_text())
        os.kill(parent.pid, signal.SIGKILL)
        parent.wait(timeout=30)
        deadline = time.monotonic() + 30
        while _alive(child_pid):
            assert time.monotonic() < deadline, "the child outlived its parent"
            time.sleep(0.05)
    finally:
        if parent.poll() is None:
            parent.kill()


def _alive(pid: int) -> bool:
    """Whether ``pid`` runs (a zombie, reaped by init soon, counts as ended)."""
    try:
        with open(f"/proc/{pid}/stat", encoding="utf-8") as f:
            return f.read().rsplit(")", 1)[1].split()[0] != "Z"
    except FileNotFoundError:
        return False
