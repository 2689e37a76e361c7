"""Process settings a run makes for speed, none of which may change a result.

- The CLI asks NumPy for ordinary pages unless the user chose (``NUMPY_MADVISE_HUGEPAGE``).
  Checked in fresh interpreters, against NumPy itself: ``_set_madvise_hugepage`` returns the
  setting NumPy took at import (NumPy reference manual, "Global state"; the function is
  NumPy's own switch, private, used here only to read the setting back).
- The road graph is read and built collecting cyclic garbage less often; the collector's
  thresholds are restored after (CPython ``gc.get_threshold`` / ``gc.set_threshold``).
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
