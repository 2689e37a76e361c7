"""altigrade benchmark harness: scale scenarios, DEM sampling, corridors, a whole state run.

Usage::

    python benchmarks/run.py [--quick] [--json FILE] [--national] [--national-run]
                             [--skip KEY ...] [--repeats N] [--dask-scheduler ADDRESS]

Prints a table and (with ``--json``) writes every measurement. Ratios are measured in the same
run against baselines run in the same process (or in sibling subprocesses for memory), so
they hold on a loaded machine better than absolute times do; the load average before and
after is recorded. Scenario data are generated once and cached under ``benchmarks/data/``
(git-ignored); run outputs go to a temporary folder that is deleted afterwards.

Measurements (see benchmarks/README.md for definitions and targets):

* DEM sampling on the state DEM — ``dem_sampling_*`` (benchmarks/dem_sampling.py);
* descent corridors — ``corridor_*`` from ``benchmarks/corridors_bench.py`` when present;
* ``altigrade run`` on the state scenario in a subprocess — ``state_run_*`` with
  ``execution.mode = "threads"`` (independent stages overlap on the two cores) and
  ``state_run_local_*`` with ``mode = "local"``, against an I/O floor (a fresh interpreter
  reading every input once with the same libraries);
* Dask execution — ``dask_*``: the national subset in ``local`` mode and on a 2-worker local
  cluster, with the CPU time of each (client and workers) and the speedup that CPU would
  allow on this machine's cores at best (``dask_speedup_bound_on_this_machine``); with
  ``--dask-scheduler ADDRESS``, on the running cluster at that address instead;
* ``--national``: DEM sampling of the national stations over the VRT mosaic;
  ``--national-run`` also times ``altigrade run`` on the national scenario.

All data are invented. A planning aid: follow the vehicle maker's fuel recommendation, and
defer to local fuel regulations and licensed practice.
"""

from __future__ import annotations

import argparse
import contextlib
import datetime as dt
import importlib.util
import json
import os
import platform
import resource
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

BENCH = Path(__file__).resolve().parent
REPO = BENCH.parent
for p in (str(REPO), str(BENCH)):
    if p not in sys.path:
        sys.path.insert(0, p)

import dem_sampling  # noqa: E402
import scenarios  # noqa: E402

__all__ = [
    "TARGETS",
    "run_measured",
    "io_floor",
    "corridor_measurements",
    "dask_measurements",
    "state_run_measurements",
    "main",
]

#: The issue's targets: key → (comparison, threshold, meaning), checked after the run;
#: "==" compares exactly.
TARGETS: dict[str, tuple[str, float | bool, str]] = {
    "dem_sampling_vs_rasterio_sample": (">=", 3.0, "≥ 3× rasterio sample at 100k points"),
    "dem_sampling_vs_rasterio_sample_1m": (">=", 10.0, "≥ 10× rasterio sample at 1M points"),
    "dem_sampling_vs_in_memory": (">=", 0.8, "≥ 0.8× the in-memory approach's speed"),
    "dem_sampling_rss_vs_in_memory": ("<=", 0.4, "≤ 40 % of the in-memory peak RSS"),
    "dem_sampling_vs_decode_floor": ("<=", 1.5, "≤ 1.5× the block decode floor"),
    "state_run_vs_io_floor": ("<=", 4.0, "state run ≤ 4× the I/O floor"),
    "state_run_peak_rss_mb": ("<=", 3072.0, "state run peak RSS ≤ 3 GB"),
    "corridor_vs_networkx": (">=", 20.0, "corridors ≥ 20× networkx"),
    "corridor_vs_bare_dijkstra": ("<=", 2.0, "corridors ≤ 2× bare SciPy Dijkstra"),
    "dask_2_workers_speedup": (">=", 1.6, "national subset ≥ 1.6× faster on 2 Dask workers"),
    "dask_results_identical": ("==", True, "Dask results identical to the local run's"),
}

CORRIDOR_KEYS = ("corridor_s_per_source", "corridor_vs_networkx", "corridor_vs_bare_dijkstra")


def _log(msg: str) -> None:
    print(msg, flush=True)


# ------------------------------------------------------------------------------ subprocesses
def run_measured(
    cmd: list[str],
    *,
    cwd: Path | None = None,
    env: dict | None = None,
    timeout: float = 3600,
    orphan_wait_s: float = 30.0,
) -> dict:
    """Run ``cmd``; its wall time [s], CPU time [s], peak RSS [MB], exit code and the tail
    of its output.

    CPU time is user + system time of the child and of every process descended from it:
    this process is made the children's subreaper, so a descendant that outlives its parent
    (a Dask forkserver and the workers forked from it) comes back here, and is waited for
    (up to ``orphan_wait_s``) and counted too.

    Peak RSS is the child's own ``VmHWM`` (``/proc/<pid>/status``), read every 20 ms while it
    runs; the last reading comes at most 20 ms before it exits. The ``ru_maxrss`` that
    ``wait4`` reports is not used: Linux folds the resident peak of the memory the child was
    forked from — this benchmark process's — into it at ``exec``, so every child reported at
    least this process's own size (2.1 GB after the corridor benchmark, measured).
    """
    full_env = {**os.environ, **(env or {})}
    _become_subreaper()
    _reap_orphans(0.0)  # any left from an earlier run are not this run's
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    with tempfile.TemporaryFile() as out, tempfile.TemporaryFile() as err:
        t = time.perf_counter()
        proc = subprocess.Popen(cmd, cwd=cwd, env=full_env, stdout=out, stderr=err)
        timer = threading.Timer(timeout, proc.kill)
        timer.start()
        peak_kb = [0]
        done = threading.Event()
        watcher = threading.Thread(target=_watch_hwm, args=(proc.pid, peak_kb, done), daemon=True)
        watcher.start()
        try:
            _, status, _ = os.wait4(proc.pid, 0)
        finally:
            timer.cancel()
            done.set()
            watcher.join()
        wall = time.perf_counter() - t
        proc.returncode = os.waitstatus_to_exitcode(status)
        left_running = _reap_orphans(orphan_wait_s)
        usage = resource.getrusage(resource.RUSAGE_CHILDREN)
        out.seek(0)
        err.seek(0)
        return {
            "wall_s": wall,
            "cpu_s": (usage.ru_utime - before.ru_utime) + (usage.ru_stime - before.ru_stime),
            "descendants_still_running": left_running,
            "peak_rss_mb": peak_kb[0] / 1024.0 if peak_kb[0] else None,
            "returncode": proc.returncode,
            "stdout_tail": out.read().decode(errors="replace")[-3000:],
            "stderr_tail": err.read().decode(errors="replace")[-3000:],
        }


#: prctl option number of PR_SET_CHILD_SUBREAPER (linux/prctl.h).
_PR_SET_CHILD_SUBREAPER = 36


def _become_subreaper() -> None:
    """Have orphaned descendants of this process's children reparented to this process
    (Linux ``prctl(PR_SET_CHILD_SUBREAPER)``), so that their CPU time can be counted."""
    import ctypes

    libc = ctypes.CDLL(None, use_errno=True)
    if libc.prctl(_PR_SET_CHILD_SUBREAPER, 1, 0, 0, 0) != 0:
        raise OSError(ctypes.get_errno(), "prctl(PR_SET_CHILD_SUBREAPER) failed")


def _reap_orphans(wait_s: float) -> int:
    """Wait for this process's remaining children for up to ``wait_s`` seconds; how many are
    still running after it."""
    deadline = time.monotonic() + wait_s
    while True:
        try:
            pid, _ = os.waitpid(-1, os.WNOHANG)
        except ChildProcessError:
            return 0
        if pid:
            continue
        if time.monotonic() >= deadline:
            return _children_count()
        time.sleep(0.02)


def _children_count() -> int:
    """Number of this process's child processes (``/proc/<pid>/task/*/children``)."""
    n = 0
    for task in os.listdir("/proc/self/task"):
        with contextlib.suppress(OSError), open(f"/proc/self/task/{task}/children") as f:
            n += len(f.read().split())
    return n


def _watch_hwm(pid: int, peak_kb: list[int], done: threading.Event) -> None:
    """Keep the largest ``VmHWM`` [kB] of process ``pid`` in ``peak_kb[0]`` until ``done``."""
    path = f"/proc/{pid}/status"
    while not done.is_set():
        try:
            with open(path, encoding="ascii", errors="replace") as f:
                for line in f:
                    if line.startswith("VmHWM:"):
                        peak_kb[0] = max(peak_kb[0], int(line.split()[1]))
                        break
        except (OSError, ValueError):
            pass  # not started yet, or already gone
        done.wait(0.02)


def _io_floor_child(config: Path) -> None:
    """Subprocess body: read every input of ``config`` once with the pipeline's libraries."""
    import numpy as np
    import pandas as pd
    import pyogrio
    import rasterio
    from rasterio.windows import Window

    from pipeline.config import load_config

    cfg = load_config(config)
    inp = cfg.inputs
    t = time.perf_counter()
    pd.read_csv(inp.stations, dtype=str, keep_default_na=False)
    for p in (inp.roads, inp.towns, inp.fleet_zones):
        if p is not None:
            pyogrio.read_dataframe(p)
    with rasterio.open(inp.dem) as ds:
        bh, bw = ds.block_shapes[0]
        total = 0.0
        for r in range(0, ds.height, bh):
            for c in range(0, ds.width, bw):
                a = ds.read(1, window=Window(c, r, min(bw, ds.width - c), min(bh, ds.height - r)))
                total += float(np.nanmax(a[:1, :1]))
    print(json.dumps({"read_s": time.perf_counter() - t}))


def io_floor(sc: scenarios.Scenario) -> dict:
    """The time to read every input byte once: raw bytes (in this process) and decoded with
    the libraries the pipeline uses, in a fresh interpreter (start-up and imports included)."""
    t = time.perf_counter()
    n_bytes = 0
    for f in sc.input_files:
        with open(f, "rb") as fh:
            while chunk := fh.read(1 << 22):
                n_bytes += len(chunk)
    raw = time.perf_counter() - t
    r = run_measured(
        [sys.executable, str(Path(__file__).resolve()), "--_io-floor", str(sc.config)],
        env={"PYTHONPATH": str(REPO)},
    )
    if r["returncode"] != 0:
        raise RuntimeError(f"I/O floor subprocess failed: {r['stderr_tail']}")
    inner = json.loads(r["stdout_tail"].strip().splitlines()[-1])
    return {
        "input_bytes": n_bytes,
        "raw_read_s": raw,
        "decoded_read_s": r["wall_s"],
        "decoded_read_in_process_s": inner["read_s"],
        "decoded_read_peak_rss_mb": r["peak_rss_mb"],
    }


# ------------------------------------------------------------------------------ measurements
def _load_module(path: Path, name: str):
    spec = importlib.util.spec_from_file_location(name, str(path))
    mod = importlib.util.module_from_spec(spec)
    sys.modules[name] = mod
    spec.loader.exec_module(mod)
    return mod


def corridor_measurements(quick: bool, notes: dict) -> dict:
    """``corridor_*`` keys from benchmarks/corridors_bench.py (its ``main(argv)`` returns its
    result dict); null keys with a note if it fails, so the other measurements still run."""
    out: dict = dict.fromkeys(CORRIDOR_KEYS)
    try:
        mod = _load_module(BENCH / "corridors_bench.py", "_corridors_bench")
        t = time.perf_counter()
        res = mod.main(["--quick"] if quick else [])
        out["corridor_bench_s"] = time.perf_counter() - t
    except Exception as exc:  # report, don't abort the other measurements
        notes["corridor"] = f"corridors_bench.py failed: {type(exc).__name__}: {exc}"
        return out
    if not isinstance(res, dict):
        notes["corridor"] = "corridors_bench.py returned no result dict; keys null"
        return out
    for k in CORRIDOR_KEYS:
        out[k] = res.get(k)
    out["corridor_details"] = {k: v for k, v in res.items() if k not in CORRIDOR_KEYS}
    return out


def _run_outputs_equal(a: Path, b: Path) -> dict[str, bool]:
    """Whether two run folders hold the same results: every CSV byte for byte, and every
    GeoPackage layer's attributes and geometry (read back with GDAL through pyogrio)."""
    import pyogrio

    out = {}
    for f in sorted(a.glob("*.csv")):
        out[f.name] = (b / f.name).exists() and f.read_bytes() == (b / f.name).read_bytes()
    ga, gb = a / "altigrade.gpkg", b / "altigrade.gpkg"
    for name, _ in pyogrio.list_layers(ga):
        x = pyogrio.read_dataframe(ga, layer=name)
        y = pyogrio.read_dataframe(gb, layer=name)
        same = list(x.columns) == list(y.columns) and len(x) == len(y)
        if same:
            same = (
                x.drop(columns="geometry").equals(y.drop(columns="geometry"))
                and x.geometry.to_wkb().tolist() == y.geometry.to_wkb().tolist()
            )
        out[f"altigrade.gpkg:{name}"] = same
    return out


def _run_scenario(sc: scenarios.Scenario, execution: str, out: Path, *flags: str) -> dict:
    """``altigrade run`` of the scenario in a fresh process with extra ``[execution]`` keys
    (``execution``, TOML lines); the config is written beside the scenario (its input paths
    are relative to its folder) and removed afterwards."""
    body = sc.config.read_text(encoding="utf-8").replace(
        "[execution]\n", "[execution]\n" + execution, 1
    )
    cfg_here = sc.folder / f".bench-{out.name}.toml"
    cfg_here.write_text(body, encoding="utf-8")
    try:
        return run_measured(
            [sys.executable, "-m", "pipeline.cli", *flags, "run", str(cfg_here), "--out", str(out)],
            cwd=REPO,
        )
    finally:
        cfg_here.unlink(missing_ok=True)


def _cpu_model() -> str:
    """The processor's model name (``/proc/cpuinfo`` on Linux, else the platform's word)."""
    try:
        for line in Path("/proc/cpuinfo").read_text(encoding="utf-8").splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


def _packages() -> dict[str, str]:
    """Versions of the libraries the run's speed depends on (those the run's manifest lists,
    and the compiler and the cluster)."""
    from importlib import metadata

    from pipeline.runner import _package_versions

    out = _package_versions()
    for name in ("numba", "dask", "distributed", "pyarrow"):
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out


def _commit() -> str | None:
    """The checked-out commit of the repository, or None outside a git checkout."""
    try:
        r = subprocess.run(
            ["git", "rev-parse", "HEAD"], cwd=REPO, capture_output=True, text=True, timeout=10
        )
    except (OSError, subprocess.SubprocessError):
        return None
    return (r.stdout.strip() or None) if r.returncode == 0 else None


def dask_execution_lines(workers: int = 2, scheduler: str | None = None) -> str:
    """The ``[execution]`` lines of the Dask run: a local cluster of ``workers`` worker
    processes started by the run, or the running cluster at ``scheduler`` (its workers)."""
    if scheduler:
        return f'mode = "dask"\nscheduler = {json.dumps(scheduler)}\n'
    return f'mode = "dask"\nworkers = {workers}\n'


def dask_measurements(
    sc: scenarios.Scenario, notes: dict, workers: int = 2, scheduler: str | None = None
) -> dict:
    """``dask_2_workers_speedup`` and ``dask_results_identical``.

    The national subset scenario is run twice through the CLI in fresh processes: with
    ``[execution] mode = "local"`` and with ``mode = "dask"`` on a local cluster of
    ``workers`` worker processes on 127.0.0.1 (its start-up is part of the measured time),
    or, with ``scheduler``, on the running cluster at that address (whatever workers it has:
    ``dask_workers``; the key keeps its name, and a note says when they are not two). On a
    running cluster the workers' CPU is not this machine's to count, so the CPU keys and the
    bound are left out. Identical means every CSV and every GeoPackage layer of the two runs
    are equal.
    """
    out: dict = {"dask_2_workers_speedup": None, "dask_results_identical": None}
    runs = {}
    with tempfile.TemporaryDirectory(prefix="altigrade-dask-") as tmp:
        for mode in ("local", "dask"):
            local = 'mode = "local"\n'
            extra = dask_execution_lines(workers, scheduler) if mode == "dask" else local
            r = _run_scenario(sc, extra, Path(tmp) / mode, "-q")
            if r["returncode"] != 0:
                notes["dask"] = f"{mode} run failed: {r['stderr_tail'][-500:]}"
                return out
            runs[mode] = r
        same = _run_outputs_equal(Path(tmp) / "local", Path(tmp) / "dask")
        try:
            described = json.loads(
                (Path(tmp) / "dask" / "manifest.json").read_text(encoding="utf-8")
            )["execution"]
        except (OSError, ValueError, KeyError):
            described = {}
    out["dask_local_run_s"] = runs["local"]["wall_s"]
    out["dask_run_s"] = runs["dask"]["wall_s"]
    out["dask_local_run_peak_rss_mb"] = runs["local"]["peak_rss_mb"]
    out["dask_client_peak_rss_mb"] = runs["dask"]["peak_rss_mb"]
    out["dask_2_workers_speedup"] = runs["local"]["wall_s"] / runs["dask"]["wall_s"]
    out["dask_workers"] = described.get("workers", workers)
    out["dask_scheduler"] = described.get("scheduler", scheduler)
    out["dask_cores"] = os.cpu_count()
    out["dask_local_run_cpu_s"] = runs["local"]["cpu_s"]
    if scheduler:
        if out["dask_workers"] != 2:
            notes["dask_2_workers_speedup"] = (
                f"measured on the cluster at {scheduler}, which has {out['dask_workers']} "
                "workers, not 2"
            )
    else:
        # CPU of the client and its workers; on os.cpu_count() cores the Dask run cannot
        # finish sooner than that CPU spread perfectly over them, whatever the scheduling
        out["dask_run_cpu_s"] = runs["dask"]["cpu_s"]
        cores = min(os.cpu_count() or 1, workers + 1)
        out["dask_speedup_bound_on_this_machine"] = runs["local"]["wall_s"] / (
            runs["dask"]["cpu_s"] / cores
        )
    out["dask_results_identical"] = all(same.values())
    out["dask_compared_outputs"] = same
    out["dask_scenario"] = sc.meta.get("name", str(sc.folder.name))
    return out


#: How the state run is executed: the one-machine setting that uses both cores (independent
#: stages overlap); the same run in ``local`` mode is reported beside it.
STATE_RUN_EXECUTION = 'mode = "threads"\nworkers = 2\n'


#: Timed state runs per mode (and I/O floors); the median is reported, every sample kept.
STATE_RUN_REPEATS = 3


def _warm_up_imports() -> None:
    """Import the pipeline once in a throw-away interpreter, so that the first timed run does
    not also pay for reading the libraries from a cold disk cache (the floor's interpreter
    imports the same libraries)."""
    run_measured(
        [sys.executable, "-c", "import pipeline.stages, pipeline.maps, pipeline.report"],
        cwd=REPO,
        env={"PYTHONPATH": str(REPO)},
    )


def state_run_measurements(
    sc: scenarios.Scenario, notes: dict, prefix: str = "state", repeats: int = STATE_RUN_REPEATS
) -> dict:
    """``<prefix>_run_s``, ``<prefix>_run_peak_rss_mb``, ``<prefix>_run_vs_io_floor`` of the
    run with :data:`STATE_RUN_EXECUTION`, and ``<prefix>_run_local_*`` of the same run with
    ``mode = "local"`` (stages one after another); both in fresh processes, outputs compared.

    The shared machine's speed drifts by up to 2× within minutes, so each mode runs
    ``repeats`` times, the two modes alternately, after one untimed import; times are the
    median of their runs and the floor the median of as many floors, each timed between the
    two runs of its repeat; ``<prefix>_run_vs_io_floor`` is the median of each repeat's run
    over its own floor (``<prefix>_run_median_vs_floor_median`` divides the medians; every
    sample is kept under ``<prefix>_run_samples``). Peak RSS is the largest of the runs."""
    out: dict = {
        f"{prefix}_run_s": None,
        f"{prefix}_run_peak_rss_mb": None,
        f"{prefix}_run_vs_io_floor": None,
    }
    _warm_up_imports()
    samples: dict[str, list[dict]] = {"overlap": [], "local": []}
    floors: list[dict] = []
    with tempfile.TemporaryDirectory(prefix=f"altigrade-{prefix}-run-") as tmp:
        for i in range(repeats):
            for name, extra in (("overlap", STATE_RUN_EXECUTION), ("local", 'mode = "local"\n')):
                folder = Path(tmp) / f"{name}{i}"
                r = _run_scenario(sc, extra, folder, "-v")
                if r["returncode"] != 0:
                    out[f"{prefix}_run_returncode"] = r["returncode"]
                    notes[f"{prefix}_run"] = (
                        f"altigrade run ({name}) failed (exit {r['returncode']}): "
                        + (r["stderr_tail"] or r["stdout_tail"])[-800:]
                    )
                    return out
                try:
                    m = json.loads((folder / "manifest.json").read_text(encoding="utf-8"))
                except (OSError, ValueError):
                    m = {}
                r["manifest"] = m
                samples[name].append(r)
                if name == "overlap":
                    # this repeat's floor, timed between its two runs: the shared machine's
                    # speed drifts within minutes, so each run is divided by the floor
                    # timed beside it
                    floors.append(io_floor(sc))
            if i == 0:
                same = _run_outputs_equal(Path(tmp) / "local0", Path(tmp) / "overlap0")
    out[f"{prefix}_run_returncode"] = 0
    out[f"{prefix}_run_outputs_equal_local"] = all(same.values())

    def median_run(runs: list[dict]) -> dict:
        return sorted(runs, key=lambda r: r["wall_s"])[len(runs) // 2]

    def median(values: list[float]) -> float:
        return sorted(values)[len(values) // 2]

    r, loc = median_run(samples["overlap"]), median_run(samples["local"])
    floor = sorted(floors, key=lambda f: f["decoded_read_s"])[len(floors) // 2]
    # each repeat's run over the floor timed beside it; the key is their median
    ratios = {
        name: [x["wall_s"] / f["decoded_read_s"] for x, f in zip(runs, floors, strict=True)]
        for name, runs in samples.items()
    }
    m = r["manifest"]
    out[f"{prefix}_run_stage_s"] = m.get("timings_s")
    out[f"{prefix}_run_stage_spans_s"] = m.get("stage_spans_s")
    out[f"{prefix}_run_stations_out"] = m.get("counts", {}).get("stations_out")
    out[f"{prefix}_run_execution"] = m.get("execution")
    out[f"{prefix}_run_local_stage_s"] = loc["manifest"].get("timings_s")
    out.update(
        {
            f"{prefix}_run_s": r["wall_s"],
            f"{prefix}_run_peak_rss_mb": max(x["peak_rss_mb"] or 0 for x in samples["overlap"]),
            f"{prefix}_io_floor_s": floor["decoded_read_s"],
            f"{prefix}_io_raw_read_s": floor["raw_read_s"],
            f"{prefix}_input_bytes": floor["input_bytes"],
            f"{prefix}_run_vs_io_floor": median(ratios["overlap"]),
            f"{prefix}_run_median_vs_floor_median": r["wall_s"] / floor["decoded_read_s"],
            f"{prefix}_run_vs_raw_byte_read": r["wall_s"] / max(floor["raw_read_s"], 1e-9),
            f"{prefix}_run_local_s": loc["wall_s"],
            f"{prefix}_run_local_peak_rss_mb": max(x["peak_rss_mb"] or 0 for x in samples["local"]),
            f"{prefix}_run_local_vs_io_floor": median(ratios["local"]),
            f"{prefix}_run_samples": {
                "overlap_wall_s": [x["wall_s"] for x in samples["overlap"]],
                "local_wall_s": [x["wall_s"] for x in samples["local"]],
                "io_floor_s": [f["decoded_read_s"] for f in floors],
                "overlap_vs_floor": ratios["overlap"],
                "local_vs_floor": ratios["local"],
                "statistic": f"median of {repeats}; ratios: median of each repeat's run over "
                "the floor timed between its two runs",
            },
        }
    )
    return out


def national_sampling(sc: scenarios.Scenario, repeats: int, sampler=None) -> dict:
    """The national stations' own coordinates sampled on the VRT mosaic: time against the
    decode floor, and the sampler's peak RSS in a fresh interpreter."""
    import numpy as np
    import rasterio

    x, y = dem_sampling.station_points(sc.stations, sc.dem)
    fn = dem_sampling.load_sampler(sampler)
    ok = np.isfinite(x) & np.isfinite(y)
    with rasterio.open(sc.dem) as ds:
        blocks = dem_sampling.touched_blocks(ds, x[ok], y[ok])
    dem_sampling.time_decode_floor(sc.dem, blocks, repeats=1)  # warm the page cache
    t_s = t_f = float("inf")
    for _ in range(max(1, repeats)):
        t, res = dem_sampling.time_sampler(sc.dem, x, y, fn, repeats=1)
        t_s = min(t_s, t)
        t, _ = dem_sampling.time_decode_floor(sc.dem, blocks, repeats=1)
        t_f = min(t_f, t)
    rss = dem_sampling.peak_rss_subprocess(
        "sampler", sc.dem, 0, sampler=sampler, stations=sc.stations
    )
    return {
        "national_dem_cells": sc.meta.get("dem_cells"),
        "national_sampling_points": int(x.size),
        "national_sampling_s": t_s,
        "national_sampling_pts_per_s": x.size / t_s,
        "national_sampling_blocks_read": int(res.blocks_read),
        "national_decode_floor_s": t_f,
        "national_sampling_vs_decode_floor": t_s / t_f,
        "national_sampling_peak_rss_mb": rss["peak_rss_mb"],
        "national_sampling_net_rss_mb": rss["peak_rss_mb"] - rss["base_hwm_mb"],
    }


# ------------------------------------------------------------------------------------ report
def _check_targets(res: dict) -> dict:
    out = {}
    for key, (op, thr, what) in TARGETS.items():
        v = res.get(key)
        if v is None:
            ok = None
        elif op == "==":
            ok = v is thr if isinstance(thr, bool) else v == thr
        else:
            ok = v >= thr if op == ">=" else v <= thr
        shown = _fmt(thr) if isinstance(thr, bool) else f"{thr:g}"
        out[key] = {"target": f"{op} {shown}", "value": v, "met": ok, "meaning": what}
    return out


def _fmt(v) -> str:
    if v is None:
        return "null"
    if isinstance(v, bool):
        return str(v).lower()
    if isinstance(v, float):
        return f"{v:,.4g}" if abs(v) < 1e5 else f"{v:,.0f}"
    if isinstance(v, int):
        return f"{v:,}"
    return str(v)


TABLE_KEYS = (
    "dem_sampling_pts_per_s",
    "dem_sampling_s",
    "dem_sampling_vs_rasterio_sample",
    "dem_sampling_vs_rasterio_sample_1m",
    "dem_sampling_vs_in_memory",
    "dem_sampling_peak_rss_mb",
    "in_memory_peak_rss_mb",
    "dem_sampling_rss_vs_in_memory",
    "dem_sampling_net_rss_vs_in_memory",
    "dem_sampling_vs_decode_floor",
    "dem_sampling_1m_vs_decode_floor",
    "corridor_s_per_source",
    "corridor_vs_networkx",
    "corridor_vs_bare_dijkstra",
    "state_run_s",
    "state_run_peak_rss_mb",
    "state_io_floor_s",
    "state_run_vs_io_floor",
    "state_run_local_s",
    "state_run_local_vs_io_floor",
    "dask_2_workers_speedup",
    "dask_workers",
    "dask_local_run_cpu_s",
    "dask_run_cpu_s",
    "dask_speedup_bound_on_this_machine",
    "dask_results_identical",
    "national_sampling_pts_per_s",
    "national_sampling_vs_decode_floor",
    "national_sampling_peak_rss_mb",
    "national_sampling_net_rss_mb",
    "national_run_s",
    "national_run_peak_rss_mb",
    "national_run_vs_io_floor",
)


def print_table(res: dict) -> None:
    targets = res.get("targets", {})
    w = max(len(k) for k in TABLE_KEYS)
    print(
        f"\naltigrade benchmarks ({res['mode']}, {res['machine']['cpus']} CPUs, load "
        f"{res['machine']['load_before']} → {res['machine']['load_after']})"
    )
    for k in TABLE_KEYS:
        if k not in res:
            continue
        t = targets.get(k)
        mark = ""
        if t is not None:
            mark = (
                f"  target {t['target']}: " + {True: "met", False: "MISSED", None: "n/a"}[t["met"]]
            )
        print(f"  {k:<{w}}  {_fmt(res[k]):>12}{mark}")
    for k, v in res.get("notes", {}).items():
        print(f"  note [{k}]: {v}")


# -------------------------------------------------------------------------------------- main
def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="Run the altigrade benchmarks.")
    ap.add_argument("--quick", action="store_true", help="small scenarios (under 5 minutes)")
    ap.add_argument("--json", type=Path, default=None, help="write the results here")
    ap.add_argument(
        "--national", action="store_true", help="also sample the national stations on its VRT"
    )
    ap.add_argument(
        "--national-run",
        action="store_true",
        help="also time `altigrade run` on the national scenario (long; implies --national)",
    )
    ap.add_argument(
        "--skip",
        nargs="*",
        default=[],
        choices=["dem", "corridors", "state_run", "dask"],
        help="measurements to leave out",
    )
    ap.add_argument("--repeats", type=int, default=None, help="timing repeats (best kept)")
    ap.add_argument(
        "--dask-scheduler",
        metavar="ADDRESS",
        default=None,
        help="measure the dask_* keys on the running Dask cluster at ADDRESS (e.g. "
        "tcp://10.0.0.5:8786; its workers need altigrade installed) instead of a 2-worker "
        "local cluster started by the run",
    )
    ap.add_argument("--_io-floor", dest="io_floor", type=Path, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.io_floor:
        _io_floor_child(args.io_floor)
        return 0

    import numpy as np
    import rasterio

    t_all = time.perf_counter()
    repeats = args.repeats or (3 if args.quick else 5)
    res: dict = {
        "mode": "quick" if args.quick else "full",
        "date": dt.datetime.now().isoformat(timespec="seconds"),
        "machine": {
            "cpus": os.cpu_count(),
            "load_before": [round(v, 2) for v in os.getloadavg()],
            "python": platform.python_version(),
            "numpy": np.__version__,
            "rasterio": rasterio.__version__,
            "gdal": rasterio.__gdal_version__,
            # ratios against a floor or a baseline moved by 40 % between two machines of the
            # same kind with different packages (2026-12-02/03): record what to tell them by
            "cpu_model": _cpu_model(),
            "packages": _packages(),
            "commit": _commit(),
        },
    }
    notes: dict[str, str] = {}
    _log(f"altigrade benchmarks ({res['mode']})")
    state = scenarios.get_scenario("state", args.quick, log=_log)
    res["state_scenario"] = {k: v for k, v in state.meta.items() if k != "dem_tiles"}

    if "dem" not in args.skip:
        # The sampling targets are defined on the full state DEM (25 M cells), so it is used in
        # quick mode too (generated once, cached); quick mode only times fewer repeats and
        # scales rasterio's 1 M-point time from 200 000 points.
        dem_sc = state if not args.quick else scenarios.get_scenario("state", False, log=_log)
        _log(f"DEM sampling on {dem_sc.dem} ...")
        res.update(
            dem_sampling.measure(
                dem_sc.dem,
                points=100_000,
                points_large=1_000_000,
                rasterio_subset_large=200_000 if args.quick else None,
                repeats=repeats,
                log=_log,
            )
        )
        if args.quick:
            notes["dem_sampling_vs_rasterio_sample_1m"] = (
                "quick mode: rasterio timed on 200,000 of the 1,000,000 points, scaled linearly"
            )
    if "corridors" not in args.skip:
        _log("corridors (benchmarks/corridors_bench.py) ...")
        res.update(corridor_measurements(args.quick, notes))
    if "state_run" not in args.skip:
        _log("altigrade run on the state scenario ...")
        res.update(state_run_measurements(state, notes))
    if "dask" not in args.skip:
        # the national subset: the national scenario's quick variant (15,000 stations on a
        # VRT of four tiles), in both modes
        nat_sub = scenarios.get_scenario("national", True, log=_log)
        on = f"the cluster at {args.dask_scheduler}" if args.dask_scheduler else "2 workers"
        _log(f"altigrade run on the national subset, local and on Dask ({on}) ...")
        res.update(dask_measurements(nat_sub, notes, scheduler=args.dask_scheduler))
    if args.national or args.national_run:
        nat = scenarios.get_scenario("national", args.quick, log=_log)
        res["national_scenario"] = {k: v for k, v in nat.meta.items() if k != "dem_tiles"}
        _log("DEM sampling of the national stations on the VRT mosaic ...")
        res.update(national_sampling(nat, repeats=max(1, repeats // 2)))
        if args.national_run:
            _log("altigrade run on the national scenario ...")
            res.update(state_run_measurements(nat, notes, prefix="national", repeats=1))

    res["machine"]["load_after"] = [round(v, 2) for v in os.getloadavg()]
    res["total_s"] = time.perf_counter() - t_all
    res["targets"] = _check_targets(res)
    res["notes"] = notes
    print_table(res)
    print(f"  total {res['total_s']:.0f} s")
    if args.json:
        args.json.parent.mkdir(parents=True, exist_ok=True)
        args.json.write_text(json.dumps(res, indent=2, default=str), encoding="utf-8")
        print(f"  results written to {args.json}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
