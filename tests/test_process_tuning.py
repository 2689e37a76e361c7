"""Process settings a run makes for speed, none of which may change a result.

- The CLI asks NumPy for ordinary pages unless the user chose (``NUMPY_MADVISE_HUGEPAGE``).
  Checked in fresh interpreters, against NumPy itself: ``_set_madvise_hugepage`` returns the
  setting NumPy took at import (NumPy reference manual, "Global state"; the function is
  NumPy's own switch, private, used here only to read the setting back).
- The road graph is read and built collecting cyclic garbage less often; the collector's
  thresholds are restored after (CPython ``gc.get_threshold`` / ``gc.set_threshold``).
- The program's own command freezes the collector when it is done, in a real process, with
  main's exit status; ``main`` called from Python does not (CPython ``gc.freeze``).
"""

from __future__ import annotations

import gc
import os
import subprocess
import sys

import pytest
from conftest import REPO

from pipeline.config import parse_config

PROBE = (
    "from pipeline.cli import small_pages_for_numpy as f\n"
    "print(f())\n"
    "import numpy\n"
    "print(numpy._core.multiarray._set_madvise_hugepage(True))\n"
)


def probe(env_value: str | None) -> list[str]:
    env = {k: v for k, v in os.environ.items() if k != "NUMPY_MADVISE_HUGEPAGE"}
    if env_value is not None:
        env["NUMPY_MADVISE_HUGEPAGE"] = env_value
    env["PYTHONPATH"] = str(REPO)
    r = subprocess.run(
        [sys.executable, "-c", PROBE], env=env, capture_output=True, text=True, timeout=120
    )
    assert r.returncode == 0, r.stderr
    return r.stdout.split()


def test_unset_means_numpy_imports_with_huge_page_advice_off():
    assert probe(None) == ["True", "False"]


@pytest.mark.parametrize("value, numpy_setting", [("1", "True"), ("0", "False")])
def test_a_value_the_user_set_is_kept(value, numpy_setting):
    assert probe(value) == ["False", numpy_setting]


def test_nothing_changes_once_numpy_is_imported():
    import numpy  # noqa: F401  (already imported by the test session; stated for the reader)

    from pipeline.cli import small_pages_for_numpy

    env: dict[str, str] = {}
    assert small_pages_for_numpy(env) is False
    assert env == {}


def test_the_road_graph_is_built_under_raised_thresholds_restored_after(
    small_demo_inputs, tmp_path, monkeypatch
):
    import pipeline.corridor_stage as cs
    from pipeline.execution import ROAD_GRAPH_GC_THRESHOLDS

    seen = []

    class Stop(Exception):
        pass

    def build_probe(roads):  # called where the road graph is built, after the roads are read
        seen.append(gc.get_threshold())
        raise Stop

    monkeypatch.setattr(cs, "build_road_graph", build_probe)
    d = small_demo_inputs
    cfg = parse_config(
        {
            "inputs": {
                "stations": str(d / "stations.csv"),
                "dem": str(d / "dem.tif"),
                "roads": str(d / "roads.gpkg"),
            }
        },
        base_dir=tmp_path,
    )

    class Ctx:
        config = cfg
        counts: dict = {}

    before = gc.get_threshold()
    assert before != ROAD_GRAPH_GC_THRESHOLDS  # CPython's default (700, 10, 10), or close
    with pytest.raises(Stop):
        cs.road_graph_stage(Ctx(), {})
    assert seen == [ROAD_GRAPH_GC_THRESHOLDS]
    assert gc.get_threshold() == before  # restored, even though the stage failed


def test_thresholds_already_higher_are_kept():
    from pipeline.execution import fewer_full_collections

    before = gc.get_threshold()
    try:
        gc.set_threshold(1_000_000, 5, 500)
        with fewer_full_collections():
            assert gc.get_threshold() == (1_000_000, 20, 500)
        assert gc.get_threshold() == (1_000_000, 5, 500)
    finally:
        gc.set_threshold(*before)


# The program's end: ``command`` (the console script and ``python -m pipeline.cli``) freezes
# the collector after ``main`` returns, so that the interpreter's shutdown collections skip
# what the run made (CPython ``gc.freeze`` / ``gc.get_freeze_count``; the shutdown
# collections leave the permanent generation alone, CPython's ``Python/gc.c``).
END_PROBE = (
    "import atexit, gc, sys\n"
    "atexit.register(lambda: print('frozen', gc.get_freeze_count()))\n"
    "from pipeline.cli import command\n"
    "sys.argv = ['altigrade', *sys.argv[1:]]\n"
    "sys.exit(command())\n"
)


def _end_probe(*args: str) -> subprocess.CompletedProcess:
    env = dict(os.environ, PYTHONPATH=str(REPO))
    return subprocess.run(
        [sys.executable, "-c", END_PROBE, *args],
        env=env,
        capture_output=True,
        text=True,
        timeout=300,
    )


def test_the_program_leaves_its_objects_to_the_process_end(small_demo_inputs, tmp_path):
    d = small_demo_inputs
    cfg = tmp_path / "run.toml"
    cfg.write_text(
        "[inputs]\n"
        f'stations = "{(d / "stations.csv").as_posix()}"\n'
        f'dem = "{(d / "dem.tif").as_posix()}"\n'
        f'roads = "{(d / "roads.gpkg").as_posix()}"\n',
        encoding="utf-8",
    )
    r = _end_probe("-q", "validate", str(cfg))
    assert r.returncode == 0, r.stderr
    frozen = int(r.stdout.split("frozen")[-1])
    assert frozen > 10_000  # every module, config and table object the command made


def test_the_programs_exit_status_is_mains(tmp_path):
    # a config that does not exist: exit 2 with one message, frozen or not
    r = _end_probe("-q", "validate", str(tmp_path / "missing.toml"))
    assert r.returncode == 2
    assert "missing.toml" in r.stderr
    assert "Traceback" not in r.stderr


def test_main_called_from_python_leaves_the_collector_alone(tmp_path):
    from pipeline import cli

    before = gc.get_freeze_count()
    assert cli.main(["-q", "validate", str(tmp_path / "missing.toml")]) == 2
    assert gc.get_freeze_count() == before


def test_the_installed_command_is_the_freezing_entry_point():
    from importlib.metadata import entry_points

    (ep,) = entry_points(group="console_scripts", name="altigrade")
    assert ep.value == "pipeline.cli:command"
