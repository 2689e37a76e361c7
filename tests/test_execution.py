"""Execution modes (pipeline.execution): the reduced demo run through the real CLI in this
process, on a thread pool, and on a real Dask LocalCluster of two worker processes on the
loopback interface, with every stage cut into many partitions.

Reference: the single-process run. Plain regression checks (no outside reference applies):
every GeoPackage layer (read back with GDAL) and every CSV must be identical to it.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from conftest import REPO, run_cli
from test_determinism import layer_hashes

pytest.importorskip("distributed")

#: Small partitions, so that each stage really is cut into many pieces on the small demo.
PARTITIONS = (
    "partition_sources = 2\npartition_edges = 20\npartition_stations = 7\npartition_tiles = 1\n"
)


def demo_config(inputs: Path, execution: str) -> str:
    text = (REPO / "config" / "demo.toml").read_text(encoding="utf-8")
    text = text.replace("{demo}", inputs.as_posix())
    text = text.replace('"rules/', f'"{(REPO / "config" / "rules").as_posix()}/')
    return text + f"\n[execution]\n{execution}"


@pytest.fixture(scope="module")
def runs(small_demo_inputs, tmp_path_factory) -> dict[str, Path]:
    base = tmp_path_factory.mktemp("modes")
    out = {}
    for mode, extra in (
        ("one_piece", 'mode = "local"\npartition_sources = 100000\n'),
        ("local", 'mode = "local"\n'),
        ("threads", 'mode = "threads"\nworkers = 2\n'),
        ("dask", 'mode = "dask"\nworkers = 2\n'),
    ):
        cfg = base / f"{mode}.toml"
        cuts = "" if mode == "one_piece" else PARTITIONS
        cfg.write_text(demo_config(small_demo_inputs, extra + cuts), encoding="utf-8")
        proc = run_cli("run", str(cfg), "--out", str(base / mode))
        assert proc.returncode == 0, proc.stderr
        out[mode] = base / mode
    return out


@pytest.mark.parametrize("mode", ["threads", "dask"])
def test_every_layer_and_table_identical_to_the_single_process_run(runs, mode):
    ref, got = runs["local"], runs[mode]
    assert layer_hashes(got / "altigrade.gpkg") == layer_hashes(ref / "altigrade.gpkg")
    names = sorted(p.name for p in ref.glob("*.csv"))
    assert "stations.csv" in names and "supply_plan.csv" in names
    for name in names:
        assert (got / name).read_bytes() == (ref / name).read_bytes(), name
    # the maps too (the report echoes the config, [execution] included, so it may differ there)
    for name in ("map.html", "map_distributor.html", "map_public.html"):
        assert (got / name).read_bytes() == (ref / name).read_bytes(), name


def test_the_work_really_was_partitioned_and_distributed(runs):
    m = json.loads((runs["dask"] / "manifest.json").read_text(encoding="utf-8"))
    assert m["execution"] == {
        "mode": "dask",
        "workers": 2,
        "scheduler": "local cluster on 127.0.0.1",
        "started": True,
    }
    for key in (
        "station_sampling_partitions",
        "fleet_partitions",
        "edge_profile_partitions",
        "corridor_partitions",
    ):
        assert m["counts"][key] >= 3, key
    local = json.loads((runs["local"] / "manifest.json").read_text(encoding="utf-8"))
    assert local["execution"] == {"mode": "local", "workers": 1}
    # the mode is not part of any stage's key: a cached stage serves every mode
    assert m["stage_keys"] == local["stage_keys"]


def test_stages_overlap_where_the_mode_allows_and_the_manifest_is_the_same(runs):
    """In threads and dask mode stages overlap, each starting only once what it needs has
    ended; in local mode every stage starts after the one before it ended. The counts are the
    same in every mode."""
    spans = {}
    counts = {}
    for mode in ("local", "threads", "dask"):
        m = json.loads((runs[mode] / "manifest.json").read_text(encoding="utf-8"))
        spans[mode], counts[mode] = m["stage_spans_s"], m["counts"]
    local = sorted(spans["local"].values())
    assert all(b[0] >= a[1] for a, b in zip(local, local[1:], strict=False))
    for mode in ("threads", "dask"):
        th = spans[mode]
        # with a road layer the road graph needs nothing: the head of the longest chain, it
        # starts beside the stations' ingest (the zones, needed by publish alone, wait)
        assert th["road_graph"][0] < th["ingest"][1]
        assert th["terrain"][0] >= th["ingest"][1]  # it waits for what it needs
        assert th["corridors"][0] >= max(th["compliance"][1], th["road_profiles"][1])
        # the relief is drawn only once the stations are placed (an order, not a need)
        assert th["basemap"][0] >= th["terrain"][1]
    # the data decide the partitions: every count agrees, partition counts included
    assert counts["threads"] == counts["local"] == counts["dask"]


@pytest.mark.parametrize(
    "mode,workers,expected,per_piece",
    [
        ("local", None, 1, 1),
        ("threads", None, 2, 2),
        ("threads", 1, 1, 1),
        ("threads", 4, 2, 2),
        ("dask", 1, 3, 1),
        ("dask", 2, 3, 1),
    ],
)
def test_how_many_stages_run_at_once(mode, workers, expected, per_piece):
    from pipeline.config import ExecutionConfig
    from pipeline.execution import make_executor

    ex = make_executor(ExecutionConfig(mode=mode, workers=workers))
    assert ex.concurrent_stages == expected
    assert ex.overlaps_stages == (expected > 1)
    assert ex.threads_per_piece == per_piece  # threads a partition's town trees may use


def test_a_scheduler_that_does_not_answer_exits_2_naming_the_key(small_demo_inputs, tmp_path):
    cfg = tmp_path / "far.toml"
    cfg.write_text(
        demo_config(
            small_demo_inputs,
            'mode = "dask"\nscheduler = "tcp://127.0.0.1:9"\nconnect_timeout_s = 2.0\n',
        ),
        encoding="utf-8",
    )
    proc = run_cli("run", str(cfg), "--out", str(tmp_path / "o"))
    assert proc.returncode == 2, proc.stderr
    assert "Traceback" not in proc.stderr
    line = proc.stderr.strip()
    assert len(line.splitlines()) == 1
    assert "far.toml" in line and "execution.scheduler" in line and "127.0.0.1:9" in line


def test_a_scheduler_without_dask_mode_is_a_config_error(small_demo_inputs, tmp_path):
    cfg = tmp_path / "mixed.toml"
    cfg.write_text(
        demo_config(small_demo_inputs, 'mode = "threads"\nscheduler = "tcp://127.0.0.1:8786"\n'),
        encoding="utf-8",
    )
    proc = run_cli("run", str(cfg), "--out", str(tmp_path / "o"))
    assert proc.returncode == 2
    assert "scheduler" in proc.stderr and "dask" in proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1


def test_cutting_the_work_changes_no_station_result(runs):
    """Every station's numbers depend on that station alone: the same run in one piece and in
    many small pieces gives the same station table (edge sums may differ in the last bit)."""
    one, many = runs["one_piece"], runs["local"]
    assert (one / "stations.csv").read_bytes() == (many / "stations.csv").read_bytes()
    assert (one / "supply_plan.csv").read_bytes() == (many / "supply_plan.csv").read_bytes()


def test_a_new_relief_size_redraws_the_basemap_alone(small_demo_inputs, tmp_path):
    """The relief is a stage of its own: changing its size reuses the placed and modelled
    stations, and changing nothing else leaves every table as it was."""
    cfgs = {}
    for px in (400, 300):
        text = demo_config(small_demo_inputs, 'mode = "threads"\nworkers = 2\n')
        text = text.replace("[outputs]\n", f"[outputs]\nmap_max_basemap_px = {px}\n", 1)
        assert f"map_max_basemap_px = {px}" in text
        cfgs[px] = tmp_path / f"px{px}.toml"
        cfgs[px].write_text(text, encoding="utf-8")
    out = tmp_path / "run"
    first = run_cli("run", str(cfgs[400]), "--out", str(out))
    assert first.returncode == 0, first.stderr
    before = (out / "stations.csv").read_bytes()
    second = run_cli("run", str(cfgs[300]), "--out", str(out))
    assert second.returncode == 0, second.stderr
    m = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
    assert {"ingest", "terrain", "atmosphere", "fleet", "compliance", "corridors"} <= set(
        m["stages_reused"]
    )
    assert "basemap" not in m["stages_reused"]
    assert (out / "stations.csv").read_bytes() == before
