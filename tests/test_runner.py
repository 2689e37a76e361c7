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


# ------------------------------------------------------------------ stages at the same time
def _diamond(log: list, events: dict):
    """``root`` → (``slow``, ``fast``) → ``join``; ``slow`` waits until ``fast`` has started,
    which only a run that overlaps them lets happen."""

    def root(ctx, up):
        log.append("root")
        ctx.counts["root_n"] = 1
        return {"meta": {"v": 1}}

    def slow(ctx, up):
        log.append("slow")
        overlapped = events["fast_started"].wait(timeout=20)
        ctx.counts["slow_saw_fast"] = overlapped
        return {"meta": {"v": up["root"]["meta"]["v"] + 1}}

    def fast(ctx, up):
        events["fast_started"].set()
        log.append("fast")
        ctx.counts["fast_n"] = 2
        return {"meta": {"v": up["root"]["meta"]["v"] * 10}}

    def join(ctx, up):
        log.append("join")
        assert ctx.counts["root_n"] == 1 and ctx.counts["fast_n"] == 2  # upstream counts seen
        return {"meta": {"v": up["slow"]["meta"]["v"] + up["fast"]["meta"]["v"]}}

    return [
        Stage("root", root),
        Stage("slow", slow, needs=("root",)),
        Stage("fast", fast, needs=lambda c: ("root",)),  # needs may depend on the config
        Stage("join", join, needs=("slow", "fast")),
    ]


def test_independent_stages_overlap_and_give_the_same_run(tmp_path):
    import threading

    manifests = {}
    for at_once in (1, 4):
        log: list = []
        events = {"fast_started": threading.Event()}
        if at_once == 1:
            events["fast_started"].set()  # one after another, slow would wait forever
        r = run_stages(
            _diamond(log, events),
            _cfg(tmp_path),
            tmp_path / f"out{at_once}",
            today=dt.date(2026, 12, 1),
            concurrent_stages=at_once,
        )
        assert r.artefacts["join"]["meta"] == {"v": 12}
        assert log[0] == "root" and log[-1] == "join"
        manifests[at_once] = r.manifest
    assert manifests[1]["counts"] == manifests[4]["counts"]
    assert list(manifests[4]["counts"]) == ["root_n", "slow_saw_fast", "fast_n"]  # list order
    assert manifests[1]["stage_keys"] == manifests[4]["stage_keys"]
    spans = manifests[4]["stage_spans_s"]
    assert spans["fast"][0] < spans["slow"][1] and spans["slow"][0] < spans["fast"][1]
    assert spans["join"][0] >= max(spans["slow"][1], spans["fast"][1])


def test_a_failed_stage_stops_the_run_with_the_first_error_in_list_order(tmp_path):
    import threading

    started = []

    def ok(ctx, up):
        started.append("ok")
        return {}

    def bad(message, wait=None):
        def fn(ctx, up):
            started.append(message)
            if wait is not None:
                wait.wait(timeout=20)
            raise ValueError(message)

        return fn

    second_failed = threading.Event()

    def later_bad(ctx, up):
        started.append("later")
        try:
            raise ValueError("later")
        finally:
            second_failed.set()

    stages = [
        Stage("a", ok),
        Stage("b", bad("first", wait=second_failed), needs=("a",)),
        Stage("c", later_bad, needs=("a",)),
        Stage("d", ok, needs=("c",)),
    ]
    with pytest.raises(ValueError, match="first"):
        run_stages(
            stages, _cfg(tmp_path), tmp_path / "o", today=dt.date(2026, 12, 1), concurrent_stages=4
        )
    assert sorted(started) == ["first", "later", "ok"]  # d never started


def test_a_stage_listed_before_its_needs_is_refused(tmp_path):
    stages = [Stage("late", lambda ctx, up: {}, needs=("early",)), Stage("early", _first)]
    with pytest.raises(ValueError, match="late needs"):
        run_stages(stages, _cfg(tmp_path), tmp_path / "o", today=dt.date(2026, 12, 1))


def test_start_after_orders_overlapping_stages_without_becoming_a_dependency(tmp_path):
    """``start_after`` holds a stage back until another has ended where stages overlap, but the
    stage reads nothing of it: its key is the same with or without the order."""
    import threading
    import time

    a_may_end = threading.Event()

    def a(ctx, up):
        a_may_end.wait(timeout=1.0)  # long enough for an unordered b to start first
        return {"meta": {"v": 1}}

    def b(ctx, up):
        a_may_end.set()
        return {"meta": {"v": 2}}

    keys = {}
    for order in ((), ("a",)):
        stages = [Stage("a", a), Stage("b", b, start_after=order)]
        a_may_end.clear()
        t = time.perf_counter()
        r = run_stages(
            stages,
            _cfg(tmp_path),
            tmp_path / f"o{len(order)}",
            today=dt.date(2026, 12, 1),
            concurrent_stages=2,
        )
        spans = r.manifest["stage_spans_s"]
        if order:
            assert spans["b"][0] >= spans["a"][1]  # held back until a ended
            assert time.perf_counter() - t >= 1.0  # so a waited its whole time out
        else:
            assert spans["b"][0] < spans["a"][1]  # free to start at once, and did
        keys[order] = r.manifest["stage_keys"]
    assert keys[()] == keys[("a",)]


def test_chain_lengths_count_the_longest_chain_waiting_for_each_stage():
    from pipeline.runner import chain_lengths

    noop = lambda ctx, up: {}  # noqa: E731
    stages = [
        Stage("a", noop),
        Stage("b", noop, needs=("a",)),
        Stage("c", noop, needs=("b",)),
        Stage("d", noop),
        Stage("e", noop, start_after=("d",)),
        Stage("f", noop, needs=("c", "d")),
    ]
    waits = {s.name: s.needs + s.start_after for s in stages}
    assert chain_lengths(stages, waits) == {"a": 3, "b": 2, "c": 1, "d": 1, "e": 0, "f": 0}


def test_among_ready_stages_the_head_of_the_longest_chain_starts_first(tmp_path):
    """Two slots, three stages ready at once: ``short`` and ``alone`` come first in the list,
    but ``head`` starts a chain of two more stages, so it takes a slot ahead of ``alone``
    (list order alone would have started ``short`` and ``alone``)."""
    import threading

    started: list[str] = []
    lock = threading.Lock()
    both_first = threading.Barrier(2, timeout=5.0)  # broken unless short and head overlap
    overlapping = [True]

    def body(name, meet=False):
        def run(ctx, up):
            with lock:
                started.append(name)
            if meet and overlapping[0]:
                both_first.wait()
            return {"meta": {"v": name}}

        return run

    stages = [
        Stage("short", body("short", meet=True)),
        Stage("alone", body("alone")),
        Stage("head", body("head", meet=True)),
        Stage("middle", body("middle"), needs=("head",)),
        Stage("tail", body("tail"), needs=("middle", "short")),
    ]
    run_stages(
        stages, _cfg(tmp_path), tmp_path / "o", today=dt.date(2026, 12, 1), concurrent_stages=2
    )
    assert set(started[:2]) == {"short", "head"}
    # and one at a time, list order still decides
    started.clear()
    overlapping[0] = False
    run_stages(stages, _cfg(tmp_path), tmp_path / "o1", today=dt.date(2026, 12, 1))
    assert started == ["short", "alone", "head", "middle", "tail"]


def test_a_stage_started_after_one_listed_later_is_refused(tmp_path):
    stages = [Stage("x", lambda ctx, up: {}, start_after=("y",)), Stage("y", _first)]
    with pytest.raises(ValueError, match="x starts after"):
        run_stages(stages, _cfg(tmp_path), tmp_path / "o", today=dt.date(2026, 12, 1))
    # a name that is not in the run is ignored (the stage it orders against is switched off)
    run_stages(
        [Stage("x", lambda ctx, up: {}, start_after=("absent",))],
        _cfg(tmp_path),
        tmp_path / "o2",
        today=dt.date(2026, 12, 1),
    )


# ------------------------------------------------------------------ the stages' code in keys
def test_code_hash_reads_a_module_without_importing_it(tmp_path, monkeypatch):
    import importlib
    import sys

    from pipeline.runner import _code_hash

    (tmp_path / "probe_stage_code.py").write_text("VALUE = 1\n", encoding="utf-8")
    monkeypatch.syspath_prepend(str(tmp_path))
    importlib.invalidate_caches()
    before = _code_hash(["probe_stage_code"])
    assert "probe_stage_code" not in sys.modules
    # the same key once the module is imported: a stage's key may not depend on import order
    importlib.import_module("probe_stage_code")
    monkeypatch.delitem(sys.modules, "probe_stage_code")
    assert _code_hash(["probe_stage_code"]) == before
    # a change in the code changes the key
    (tmp_path / "probe_stage_code.py").write_text("VALUE = 2\n", encoding="utf-8")
    importlib.invalidate_caches()
    assert _code_hash(["probe_stage_code"]) != before


def test_code_hash_of_a_missing_module_says_which(tmp_path):
    from pipeline.runner import _code_hash

    with pytest.raises(ModuleNotFoundError, match="no_such_stage_module"):
        _code_hash(["no_such_stage_module"])


def test_keys_are_computed_before_the_map_and_report_code_is_imported(tmp_path):
    # a fresh interpreter: the run's keys need the modules' text, not the modules
    import subprocess
    import sys

    from conftest import REPO

    probe = (
        "import sys\n"
        "from pipeline.runner import _code_hash\n"
        "_code_hash(['pipeline.maps', 'pipeline.webmap', 'pipeline.report'])\n"
        "print(sorted(m for m in ('pipeline.maps', 'pipeline.webmap', 'pipeline.report',"
        " 'folium', 'matplotlib') if m in sys.modules))\n"
    )
    r = subprocess.run(
        [sys.executable, "-c", probe],
        cwd=REPO,
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert r.returncode == 0, r.stderr
    assert r.stdout.strip() == "[]"
