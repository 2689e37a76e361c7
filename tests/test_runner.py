"""The stage runner: order, reuse of unchanged stages, recomputation when anything changes."""

from __future__ import annotations

import datetime as dt

import geopandas as gpd
import pytest
from shapely.geometry import Point

from pipeline.config import parse_config
from pipeline.runner import Stage, run_stages

CALLS: list[str] = []


def _first(ctx, up):
    CALLS.append("first")
    return {
        "table": gpd.GeoDataFrame(
            {"v": [ctx.config.zones.resolution_m]}, geometry=[Point(0, 0)], crs="EPSG:4326"
        ),
        "meta": {"n": 1},
    }


def _second(ctx, up):
    CALLS.append("second")
    t = up["first"]["table"].copy()
    t["w"] = t["v"] * 2
    return {"table": t}


def _cfg(tmp_path, resolution=900.0):
    (tmp_path / "st.csv").write_text("x", encoding="utf-8")
    data = {"inputs": {"stations": "st.csv", "dem": "d.tif"}, "zones": {"resolution_m": resolution}}
    return parse_config(data, base_dir=tmp_path)


STAGES = [
    Stage(
        "first",
        _first,
        params=lambda c: c.zones.resolution_m,
        input_files=lambda c: [c.inputs.stations],
        modules=("pipeline.atmosphere",),
    ),
    Stage("second", _second, needs=("first",)),
]


@pytest.fixture(autouse=True)
def _reset():
    CALLS.clear()


def _run(tmp_path, cfg):
    return run_stages(STAGES, cfg, tmp_path / "out", today=dt.date(2026, 12, 1))


def test_artefacts_flow_and_second_run_reuses(tmp_path):
    cfg = _cfg(tmp_path)
    r1 = _run(tmp_path, cfg)
    assert CALLS == ["first", "second"]
    assert r1.artefacts["second"]["table"]["w"].iloc[0] == 1800.0
    CALLS.clear()
    r2 = _run(tmp_path, cfg)
    assert CALLS == []
    assert set(r2.manifest["stages_reused"]) == {"first", "second"}
    assert r2.artefacts["second"]["table"]["w"].iloc[0] == 1800.0
    assert r2.artefacts["first"]["meta"] == {"n": 1}


def test_changed_parameter_recomputes_downstream(tmp_path):
    _run(tmp_path, _cfg(tmp_path))
    CALLS.clear()
    r = _run(tmp_path, _cfg(tmp_path, resolution=450.0))
    assert CALLS == ["first", "second"]
    assert r.artefacts["second"]["table"]["w"].iloc[0] == 900.0


def test_changed_input_file_recomputes(tmp_path):
    cfg = _cfg(tmp_path)
    _run(tmp_path, cfg)
    (tmp_path / "st.csv").write_text("y", encoding="utf-8")
    CALLS.clear()
    _run(tmp_path, cfg)
    assert CALLS == ["first", "second"]


def test_damaged_cache_is_recomputed(tmp_path):
    cfg = _cfg(tmp_path)
    _run(tmp_path, cfg)
    (tmp_path / "out" / ".stages" / "first" / "table.geoparquet").write_bytes(b"broken")
    CALLS.clear()
    r = _run(tmp_path, cfg)
    assert "first" in CALLS
    assert r.artefacts["second"]["table"]["w"].iloc[0] == 1800.0


def test_reuse_off_stores_nothing_and_drops_an_older_key(tmp_path):
    _run(tmp_path, _cfg(tmp_path))
    stages_dir = tmp_path / "out" / ".stages"
    assert (stages_dir / "first" / "key.json").exists()
    cfg = _cfg(tmp_path)
    cfg = cfg.model_copy(
        update={"execution": cfg.execution.model_copy(update={"reuse_unchanged_stages": False})}
    )
    CALLS.clear()
    r = _run(tmp_path, cfg)
    assert CALLS == ["first", "second"]
    assert r.artefacts["second"]["table"]["w"].iloc[0] == 1800.0
    assert not list(stages_dir.glob("*/key.json"))
    # the next run with reuse on finds nothing to reuse
    CALLS.clear()
    _run(tmp_path, _cfg(tmp_path))
    assert CALLS == ["first", "second"]
