"""Pieces run in children forked from the run's process (pipeline.execution, threads and
dask mode on Linux).

Real processes: each job runs in a child forked at the call, with the parent's memory as it
was (jobs here are closures, which pickle cannot carry, so nothing was pickled on the way),
and only the result comes back.
"""

from __future__ import annotations

import json
import os
import sys

import pytest

from pipeline.config import ExecutionConfig
from pipeline.errors import InputFileError
from pipeline.execution import make_executor

pytestmark = pytest.mark.skipif(
    not sys.platform.startswith("linux"), reason="fork and PR_SET_PDEATHSIG are Linux's"
)


@pytest.fixture
def threads():
    with make_executor(ExecutionConfig(mode="threads", workers=2)) as ex:
        assert ex.forks_pieces
        yield ex


def test_each_job_runs_in_a_child_with_the_parents_memory_and_results_come_back_in_order(
    threads,
):
    table = {"rows": list(range(1000))}  # in memory only: the children see it by the fork
    jobs = [
        (lambda k=k: (k, os.getpid(), os.getppid(), sum(table["rows"][k::4]))) for k in range(4)
    ]
    got = threads.start_in_forks(jobs).results()
    assert [g[0] for g in got] == [0, 1, 2, 3]
    assert [g[3] for g in got] == [sum(range(k, 1000, 4)) for k in range(4)]
    pids = {g[1] for g in got}
    assert len(pids) == 4 and os.getpid() not in pids
    assert {g[2] for g in got} == {os.getpid()}


def test_an_error_the_run_reports_comes_back_as_itself(threads):
    def bad():
        raise InputFileError("roads.gpkg: no such layer")

    forks = threads.start_in_forks([lambda: "fine", bad])
    with pytest.raises(InputFileError, match="roads.gpkg: no such layer"):
        forks.results()


def test_an_internal_error_comes_back_with_the_childs_traceback(threads):
    def broken():
        return {}["missing"]

    with pytest.raises(RuntimeError, match=r"(?s)Traceback.*KeyError: 'missing'"):
        threads.start_in_forks([broken]).results()


def test_a_child_that_dies_without_a_result_fails_the_call(threads):
    with pytest.raises(RuntimeError, match="ended without its result"):
        threads.start_in_forks([lambda: os._exit(3)]).results()


def test_threads_and_dask_mode_fork_and_count_their_forked_pieces():
    with make_executor(ExecutionConfig(mode="local", workers=2)) as ex:
        assert not ex.forks_pieces
        assert "pieces_in_forked_children" not in ex.describe()
    with make_executor(ExecutionConfig(mode="threads", workers=1)) as ex:
        assert not ex.forks_pieces  # one thread asked for: one thing at a time
    # dask mode: the documents are drawn by the client's children, not on the cluster (no
    # cluster is started here: the executor starts one only when the run warms it up)
    with make_executor(ExecutionConfig(mode="dask", workers=2)) as ex:
        assert ex.forks_pieces
        assert ex.start_in_forks([lambda: 1, lambda: 2]).results() == [1, 2]
        assert ex.describe()["pieces_in_forked_children"] == 2


def test_a_child_writes_through_fresh_standard_streams_on_the_same_files(threads, capfd):
    """A lock another thread held on the inherited sys.stderr at the fork would stay held in
    the child: the child writes through new stream objects on file descriptors 1 and 2."""

    def job():
        print("from the child", file=sys.stderr)
        return sys.stderr is not sys.__stderr__ and sys.stdout is not sys.__stdout__

    assert threads.start_in_forks([job]).results() == [True]
    assert "from the child" in capfd.readouterr().err


def test_without_forks_the_documents_are_drawn_on_threads_and_the_outputs_are_the_same(
    small_demo_inputs, tmp_path, monkeypatch
):
    """Off Linux (threads mode there does not fork) the documents are drawn on
    the run's threads and a child interpreter writes the GeoPackage: the outputs equal those
    of the forked documents and of the single-process run (every table byte for byte, every
    GeoPackage layer by content hash, the three maps byte for byte)."""
    from conftest import REPO
    from test_determinism import layer_hashes

    from pipeline import execution, layer_writer
    from pipeline.config import load_config
    from pipeline.stages import run

    def config(name: str, execution_toml: str):
        text = (REPO / "config" / "demo.toml").read_text(encoding="utf-8")
        text = text.replace("{demo}", small_demo_inputs.as_posix())
        text = text.replace('"rules/', f'"{(REPO / "config" / "rules").as_posix()}/')
        path = tmp_path / f"{name}.toml"
        path.write_text(text + f"\n[execution]\n{execution_toml}", encoding="utf-8")
        return load_config(path)

    outs = {}
    for name, toml in (
        ("local", 'mode = "local"\n'),
        ("forked", 'mode = "threads"\nworkers = 2\n'),
    ):
        outs[name] = tmp_path / name
        run(config(name, toml), outs[name])
    if sys.platform.startswith("linux"):
        # three maps, the report and the tables' CSV text, each in a forked child
        manifest = json.loads((outs["forked"] / "manifest.json").read_text(encoding="utf-8"))
        assert manifest["execution"]["pieces_in_forked_children"] == 5
    children = []
    real = layer_writer.write_gpkg_layers_in_child
    monkeypatch.setattr(
        layer_writer,
        "write_gpkg_layers_in_child",
        lambda *a, **k: children.append(1) or real(*a, **k),
    )
    monkeypatch.setattr(execution.Executor, "forks_pieces", property(lambda self: False))
    outs["threads"] = tmp_path / "threads"
    run(config("threads", 'mode = "threads"\nworkers = 2\n'), outs["threads"])
    assert children  # the child interpreter wrote the GeoPackage
    ref = outs["local"]
    for name in ("forked", "threads"):
        got = outs[name]
        assert layer_hashes(got / "altigrade.gpkg") == layer_hashes(ref / "altigrade.gpkg")
        for f in sorted(p.name for p in ref.glob("*.csv")):
            assert (got / f).read_bytes() == (ref / f).read_bytes(), (name, f)
        for f in ("map.html", "map_distributor.html", "map_public.html"):
            assert (got / f).read_bytes() == (ref / f).read_bytes(), (name, f)
