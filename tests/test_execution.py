"""Execution modes (pipeline.execution): the reduced demo run through the real CLI in this
process, on a thread pool, and on a real Dask LocalCluster of two worker processes on the
loopback interface, with every stage cut into many partitions.

Reference: the single-process run. Plain regression checks (no outside reference applies):
every GeoPackage layer (read back with GDAL) and every CSV must be identical to it.
"""

from __future__ import annotations

import json
import sys
import time
import types
from pathlib import Path

import pytest
from conftest import REPO, bench_harness, run_cli
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
def running_cluster():
    """A Dask LocalCluster of two worker processes on the loopback interface, already up
    before the run connects to it (so every partition goes to the cluster)."""
    from distributed import LocalCluster

    with LocalCluster(
        n_workers=2,
        threads_per_worker=1,
        processes=True,
        host="127.0.0.1",
        dashboard_address="127.0.0.1:0",  # any free port: the runs' own clusters use 8787
    ) as cluster:
        yield cluster.scheduler_address


@pytest.fixture(scope="module")
def runs(small_demo_inputs, tmp_path_factory, running_cluster) -> dict[str, Path]:
    base = tmp_path_factory.mktemp("modes")
    out = {}
    for mode, extra in (
        ("one_piece", 'mode = "local"\npartition_sources = 100000\n'),
        ("local", 'mode = "local"\n'),
        ("threads", 'mode = "threads"\nworkers = 2\n'),
        ("dask", 'mode = "dask"\nworkers = 2\n'),
        ("dask_running", f'mode = "dask"\nscheduler = "{running_cluster}"\n'),
    ):
        cfg = base / f"{mode}.toml"
        cuts = "" if mode == "one_piece" else PARTITIONS
        cfg.write_text(demo_config(small_demo_inputs, extra + cuts), encoding="utf-8")
        proc = run_cli("run", str(cfg), "--out", str(base / mode))
        assert proc.returncode == 0, proc.stderr
        out[mode] = base / mode
    return out


@pytest.mark.parametrize("mode", ["threads", "dask", "dask_running"])
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


def test_the_work_really_was_partitioned_and_distributed(runs, running_cluster):
    keys = (
        "station_sampling_partitions",
        "fleet_partitions",
        "edge_profile_partitions",
        "corridor_partitions",
    )
    m = json.loads((runs["dask"] / "manifest.json").read_text(encoding="utf-8"))
    ex = m["execution"]
    assert {k: ex[k] for k in ("mode", "workers", "scheduler", "started")} == {
        "mode": "dask",
        "workers": 2,
        "scheduler": "local cluster on 127.0.0.1",
        "started": True,
    }
    for key in keys:
        assert m["counts"][key] >= 3, key
    # every partition ran somewhere: in this process while the cluster started, or on it
    pieces = ex["partitions_on_cluster"] + ex["partitions_in_client_while_starting"]
    assert pieces >= sum(m["counts"][k] for k in keys)
    # with the address of a running scheduler, every partition goes to the cluster
    # the four documents (three maps, the report) were drawn, and the tables formatted, by
    # the client's forked children, beside the cluster's client threads, not on the cluster
    if sys.platform.startswith("linux"):
        assert ex["pieces_in_forked_children"] == 5
    ready = json.loads((runs["dask_running"] / "manifest.json").read_text(encoding="utf-8"))
    ex = ready["execution"]
    if sys.platform.startswith("linux"):
        assert ex["pieces_in_forked_children"] == 5
    assert ex["scheduler"] == running_cluster and ex["workers"] == 2
    assert ex["partitions_on_cluster"] >= sum(ready["counts"][k] for k in keys)
    assert ex["partitions_in_client_while_starting"] == 0
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


def test_the_dask_benchmark_measures_on_the_running_cluster_it_is_given(
    small_demo_inputs, running_cluster, tmp_path
):
    """``benchmarks/run.py --dask-scheduler ADDRESS`` runs the Dask side of its comparison on
    the cluster at that address (for a machine or cluster with more cores than these), not on
    a local cluster of its own; it reports that cluster's workers, and leaves out the CPU
    bound it cannot count there. Both runs' outputs are compared as in the default case."""
    bench = bench_harness()
    assert bench.dask_execution_lines(2) == 'mode = "dask"\nworkers = 2\n'
    cfg = tmp_path / "scenario.toml"
    cfg.write_text(demo_config(small_demo_inputs, PARTITIONS), encoding="utf-8")
    scenario = types.SimpleNamespace(config=cfg, folder=tmp_path, meta={"name": "small demo"})
    notes: dict = {}
    out = bench.dask_measurements(scenario, notes, scheduler=running_cluster)
    assert notes == {}
    assert out["dask_scheduler"] == running_cluster and out["dask_workers"] == 2
    assert out["dask_results_identical"] is True
    assert out["dask_2_workers_speedup"] > 0
    assert "dask_speedup_bound_on_this_machine" not in out and "dask_run_cpu_s" not in out
    assert not list(tmp_path.glob(".bench-*.toml"))  # the run configs are removed


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


class _FakeClient:
    """Stands in for ``distributed.Client``: runs the mapped function in this process and
    records which items reached it (the order logic is under test, not Dask)."""

    def __init__(self):
        self.items: list = []

    def scatter(self, data, broadcast=False, hash=True):
        return [_Done(v) for v in data]

    def map(self, fn, futures, pure=True, **shared):
        self.items += [f.value for f in futures]
        kw = {k: f.value for k, f in shared.items()}
        return [_Done(fn(f.value, **kw)) for f in futures]

    def gather(self, futures):
        return [f.value for f in futures]

    def scheduler_info(self):
        return {"workers": {"w1": {}, "w2": {}}}

    def close(self):
        pass


class _Done:
    def __init__(self, value):
        self.value = value

    def release(self):
        pass


@pytest.fixture
def held_cluster(monkeypatch):
    """A local cluster that starts only when the test sets the returned event, and is then a
    :class:`_FakeClient` (no fork server is started either)."""
    import threading

    from pipeline.execution import Executor

    up = threading.Event()
    client = _FakeClient()

    def connect(self):
        assert up.wait(30)
        self._client = client

    monkeypatch.setattr(Executor, "_connect", connect)
    monkeypatch.setattr("pipeline.execution._start_fork_server", lambda modules: False)
    return up, client


def test_partitions_run_here_while_the_cluster_starts_then_on_the_cluster(held_cluster):
    """While the cluster starts, the client works through the items itself, in order; the
    moment it is up, every item not yet begun goes to it, while the client finishes the one
    in hand; the results come back in item order either way."""
    import threading

    from pipeline.config import ExecutionConfig
    from pipeline.execution import Executor

    up, client = held_cluster
    log = []

    def piece(item, *, scale):
        where = "cluster" if threading.current_thread().name == "altigrade-dask-handover" else ""
        log.append(("begin", item, where))
        if item == 2:  # the cluster comes up while the third piece runs here
            up.set()
            time.sleep(0.5)
        log.append(("end", item, where))
        return item * scale

    with Executor(ExecutionConfig(mode="dask", workers=2)) as ex:
        ex.warm_up()
        assert ex.map(piece, range(7), shared={"scale": 10}) == [0, 10, 20, 30, 40, 50, 60]
        assert client.items == [3, 4, 5, 6]  # the cluster got the rest, in order
        # ... at once: before the piece in hand here had ended
        assert log.index(("begin", 3, "cluster")) < log.index(("end", 2, ""))
        assert [e[1] for e in log if e[0] == "begin" and not e[2]] == [0, 1, 2]
        # the cluster is up now: a later stage's pieces all go to it
        assert ex.map(piece, [7, 8], shared={"scale": 1}) == [7, 8]
        assert client.items[-2:] == [7, 8]
        described = ex.describe()
    assert described["partitions_in_client_while_starting"] == 3
    assert described["partitions_on_cluster"] == 6


def test_items_all_done_here_before_the_cluster_is_up_send_nothing(held_cluster):
    from pipeline.config import ExecutionConfig
    from pipeline.execution import Executor

    up, client = held_cluster
    with Executor(ExecutionConfig(mode="dask", workers=2)) as ex:
        ex.warm_up()
        assert ex.map(lambda i: -i, range(5)) == [0, -1, -2, -3, -4]
        up.set()
    assert client.items == []


def test_a_cluster_that_fails_to_start_still_fails_the_run(monkeypatch):
    """Pieces run here while the cluster starts; its start-up error is raised all the same."""
    from pipeline.config import ExecutionConfig
    from pipeline.errors import ConfigError
    from pipeline.execution import Executor

    def connect(self):
        time.sleep(0.3)
        raise ConfigError("execution.scheduler: nothing answered")

    monkeypatch.setattr(Executor, "_connect", connect)
    monkeypatch.setattr("pipeline.execution._start_fork_server", lambda modules: False)
    ex = Executor(ExecutionConfig(mode="dask", workers=2))
    ex.warm_up()
    with pytest.raises(ConfigError, match="nothing answered"):
        ex.map(lambda i: (time.sleep(0.05), i)[1], range(100))
    ex.close()


_FORK_PROBE = """
import json, os, sys
from pipeline.config import ExecutionConfig
from pipeline.execution import Executor

def probe(_):
    return {
        "pid": os.getpid(),
        "ppid": os.getppid(),
        "loaded": sorted(
            m for m in ("pipeline.stages", "pipeline.zones", "pipeline.report", "folium")
            if m in sys.modules
        ),
        "omp": os.environ.get("OMP_NUM_THREADS"),
        "trim": os.environ.get("MALLOC_TRIM_THRESHOLD_"),
        "seed": os.environ.get("PYTHONHASHSEED"),
    }

with Executor(ExecutionConfig(mode="dask", workers=1)) as ex:
    ex.warm_up()
    ex._wait_for_start()  # the cluster is up: the item goes to it
    seen = ex.map(probe, [0])[0]
    seen["on_cluster"] = ex.describe()["partitions_on_cluster"]
seen["client"] = os.getpid()
print(json.dumps(seen))
"""


def test_workers_import_the_document_code_only_where_the_documents_go_to_them(monkeypatch):
    from pipeline import execution
    from pipeline.config import ExecutionConfig
    from pipeline.execution import Executor

    ex = Executor(ExecutionConfig(mode="dask", workers=2))
    monkeypatch.setattr(execution.sys, "platform", "linux")
    assert ex.forks_pieces
    assert ex._worker_modules() == ("pipeline.stages", "pipeline.zones")
    monkeypatch.setattr(execution.sys, "platform", "darwin")  # no forked documents there
    assert not ex.forks_pieces
    assert ex._worker_modules() == (
        "pipeline.stages",
        "pipeline.zones",
        "pipeline.maps",
        "pipeline.webmap",
        "pipeline.report",
    )


def test_local_workers_are_forked_ready_from_a_fork_server():
    """The workers of a local cluster are forked from a fork server that has the stages'
    code imported (not the map and report code: on Linux the documents are drawn by forked
    children of the client), with Dask's thread limits and hash seed but not
    its malloc trim threshold (see pipeline.execution._worker_environ). In a fresh process:
    the fork server is one per process."""
    import os
    import subprocess

    env = {k: v for k, v in os.environ.items() if k not in ("MALLOC_TRIM_THRESHOLD_",)}
    env.pop("PYTHONHASHSEED", None)
    env.pop("OMP_NUM_THREADS", None)
    proc = subprocess.run(
        [sys.executable, "-c", _FORK_PROBE],
        cwd=REPO,
        env=env,
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert proc.returncode == 0, proc.stderr
    seen = json.loads(proc.stdout.strip().splitlines()[-1])
    assert seen["on_cluster"] == 1
    assert seen["pid"] != seen["client"]
    assert seen["ppid"] != seen["client"]  # the fork server's child, not the client's
    assert seen["loaded"] == ["pipeline.stages", "pipeline.zones"]
    assert seen["omp"] == "1" and seen["trim"] is None and seen["seed"] == "6640"
