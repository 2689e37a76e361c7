"""Crash safety and safe handling of the output folder.

A run killed with SIGKILL at any point must leave the previous outputs intact and readable, and
a rerun must complete and equal a clean run. Tested with real processes of the real CLI
(``python -m pipeline.cli demo --cells 250 --stations 40 ...``): a first complete run (A) on the
reduced demo, then a run on changed inputs (B: other stations and a raised DEM) into a copy of
A's folder, killed with SIGKILL

* at the start of every stage (the runner's progress call for that stage), and
* inside publishing: in the middle of writing the GeoPackage and the map, just before each of
  the renames that put an output in place, and while a stage's cache is being saved.

The kill points are placed by a ``sitecustomize`` module put on ``PYTHONPATH`` for the child
process only (the application has no fault hook); the child is the unmodified CLI. One more
run is killed the plain way, by timing: when its verbose log says a stage is done.

Each output of a killed run is then, file by file, either A's version or (only for files
published before the kill) B's complete version; the GeoPackage opens with GDAL, the HTML ends
with ``</html>``; a rerun equals a clean run of B (see test_determinism.output_digest) and
leaves no temporary file.

Safe handling: every file a run creates is under ``--out`` (Python-level writes recorded with an
audit hook, plus listings of the input and working folders for writes from C code); an output
folder that cannot be created, a full disk (ENOSPC, simulated in-process) give exit status 2 and
one clear line.
"""

from __future__ import annotations

import errno
import hashlib
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pyogrio
import pytest
import rasterio
from conftest import REPO, SMALL_DEMO, run_cli
from test_bad_inputs import GOOD, csv_text, make_dem, write_config
from test_determinism import layer_hashes, output_digest

import pipeline.io as pio
from pipeline import cli
from pipeline.config import load_config
from pipeline.errors import InputFileError, OutputError
from pipeline.stages import STAGES, run

# ------------------------------------------------------------------ fault injection hook

SITECUSTOMIZE = r'''
"""Test-only fault injection for altigrade crash tests (ALTIGRADE_TEST_FAULT=kind:arg)."""
import os
import signal

_spec = os.environ.get("ALTIGRADE_TEST_FAULT", "")


def _die():
    os.kill(os.getpid(), signal.SIGKILL)


def _name(p):
    try:
        return os.path.basename(os.fspath(p))
    except TypeError:
        return ""


if _spec:
    kind, _, arg = _spec.partition(":")
    if kind == "stage":  # when the runner announces the start of stage `arg`
        import pipeline.stages as _st

        _orig_run_stages = _st.run_stages

        def run_stages(*a, progress=None, **kw):
            inner = progress or (lambda label, frac: None)

            def prog(label, frac):
                if label == arg:
                    _die()
                inner(label, frac)

            return _orig_run_stages(*a, progress=prog, **kw)

        _st.run_stages = run_stages
    elif kind == "replace":  # just before the rename that puts `arg` in place
        _orig_replace = os.replace

        def replace(src, dst, *a, **kw):
            if os.fspath(dst).endswith(arg):
                _die()
            return _orig_replace(src, dst, *a, **kw)

        os.replace = replace
    elif kind == "halfwrite":  # half of the bytes of `arg` written to its temporary file
        import builtins

        _orig_open = builtins.open

        class _Half:
            def __init__(self, f):
                self._f = f

            def write(self, data):
                self._f.write(data[: len(data) // 2])
                self._f.flush()
                _die()

            def __enter__(self):
                return self

            def __exit__(self, *exc):
                return self._f.__exit__(*exc)

            def __getattr__(self, k):
                return getattr(self._f, k)

        def open(file, mode="r", *a, **kw):
            f = _orig_open(file, mode, *a, **kw)
            if "w" in mode and _name(file).startswith(".tmp-" + arg + "-"):
                return _Half(f)
            return f

        builtins.open = open
    elif kind == "layer":  # after the first layer of the GeoPackage `arg` is written
        import pyogrio

        _orig_write = pyogrio.write_dataframe

        def write_dataframe(df, path, *a, **kw):
            result = _orig_write(df, path, *a, **kw)
            if _name(path).startswith(".tmp-" + arg + "-"):
                _die()
            return result

        pyogrio.write_dataframe = write_dataframe
    elif kind == "audit":  # record every Python-level file write, dump at exit
        import atexit
        import json
        import sys

        _log = arg
        _seen = []
        _WRITE = os.O_WRONLY | os.O_RDWR | os.O_CREAT | os.O_APPEND | os.O_TRUNC

        def _hook(event, args):
            try:
                if event == "open":
                    path, mode, flags = args
                    if isinstance(path, int):
                        return
                    writes = (mode is not None and any(c in mode for c in "wax+")) or (
                        mode is None and flags & _WRITE
                    )
                    if writes:
                        _seen.append(["open", os.path.abspath(os.fsdecode(path))])
                elif event in ("os.rename", "os.replace", "os.link", "os.symlink"):
                    _seen.append([event, os.path.abspath(os.fsdecode(args[1]))])
                elif event in ("os.mkdir", "os.remove", "os.rmdir", "os.truncate", "os.chmod"):
                    if not isinstance(args[0], int):
                        _seen.append([event, os.path.abspath(os.fsdecode(args[0]))])
                elif event == "shutil.rmtree":
                    _seen.append([event, os.path.abspath(os.fsdecode(args[0]))])
            except Exception:
                pass

        def _dump():
            sys.addaudithook(lambda e, a: None)
            with open(_log, "w", encoding="utf-8") as f:
                json.dump(_seen, f)

        atexit.register(_dump)
        sys.addaudithook(_hook)
'''


def _hook_env(folder: Path, fault: str) -> dict[str, str]:
    hook = folder / "hook"
    hook.mkdir(exist_ok=True)
    (hook / "sitecustomize.py").write_text(SITECUSTOMIZE, encoding="utf-8")
    return {
        **os.environ,
        "PYTHONPATH": os.pathsep.join([str(hook), os.environ.get("PYTHONPATH", "")]).rstrip(
            os.pathsep
        ),
        "ALTIGRADE_TEST_FAULT": fault,
        "PYTHONDONTWRITEBYTECODE": "1",
    }


def _demo_argv(cache: Path, out: Path, *extra: str) -> list[str]:
    return [sys.executable, "-m", "pipeline.cli", *extra, "demo", *SMALL_DEMO,
            "--out", str(out), "--cache-dir", str(cache)]  # fmt: skip


# ------------------------------------------------------------------------- the scenario


def _changed_inputs(src: Path, dst: Path) -> None:
    """A copy of the demo inputs with other station values and a DEM raised by 5 m, so that
    every stage recomputes and every output differs from the first run's."""
    shutil.copytree(src, dst)
    st = dst / "stations.csv"
    lines = st.read_text(encoding="utf-8").splitlines(keepends=True)
    head, body = lines[0], lines[1:]
    cols = head.rstrip("\n").split(",")
    k = cols.index("regular_aki")
    out = [head]
    for i, ln in enumerate(body):
        parts = ln.rstrip("\n").split(",")
        if i % 3 == 0 and len(parts) == len(cols) and parts[k] in ("85", "87"):
            parts[k] = "86"
        out.append(",".join(parts) + "\n")
    st.write_text("".join(out), encoding="utf-8")
    with rasterio.open(dst / "dem.tif", "r+") as ds:
        z = ds.read(1)
        nd = ds.nodata
        ok = np.ones(z.shape, bool) if nd is None else z != nd
        z[ok] = z[ok] + 5
        ds.write(z, 1)


STAGE_NAMES = [s.name for s in STAGES] + ["publish"]
KILL_POINTS = [f"stage:{name}" for name in STAGE_NAMES] + [
    "layer:altigrade.gpkg",
    "halfwrite:map.html",
    "replace:manifest.json",
    "replace:terrain/stations.geoparquet",
]
#: Kill points followed by a rerun that must equal a clean run (a subset, for time: a partial
#: stage cache, a complete one, and the three kinds of interrupted writes).
RERUN_POINTS = [
    "stage:terrain",
    "stage:publish",
    "layer:altigrade.gpkg",
    "halfwrite:map.html",
    "replace:terrain/stations.geoparquet",
]


@pytest.fixture(scope="module")
def scenario(small_demo_inputs, tmp_path_factory):
    """Clean runs A and B, then every kill point (killed run, then rerun), run a few at a time.

    Returns (out_A, digest_A, out_B, digest_B, {kill point: (killed proc, rerun proc, folder,
    snapshot of the folder right after the kill)})."""
    root = tmp_path_factory.mktemp("crash")
    inputs_a = root / "inputs-a" / small_demo_inputs.name
    shutil.copytree(small_demo_inputs, inputs_a)
    inputs_b = root / "inputs-b" / small_demo_inputs.name
    _changed_inputs(small_demo_inputs, inputs_b)
    cache_a, cache_b = inputs_a.parent, inputs_b.parent
    out_a, out_b = root / "out-a", root / "out-b"
    for cache, out in ((cache_a, out_a), (cache_b, out_b)):
        proc = subprocess.run(_demo_argv(cache, out), cwd=REPO, capture_output=True, text=True)
        assert proc.returncode == 0, proc.stderr
    digest_a, digest_b = output_digest(out_a), output_digest(out_b)
    assert digest_a["gpkg"] != digest_b["gpkg"]  # B really differs from A

    def start_kill(point):
        folder = root / point.replace(":", "-").replace("/", "-")
        folder.mkdir()
        out = folder / "out"
        shutil.copytree(out_a, out, symlinks=True)
        if point.startswith("stage:"):  # make sure that stage recomputes
            (out / ".stages" / point.split(":", 1)[1] / "key.json").unlink(missing_ok=True)
        p = subprocess.Popen(
            _demo_argv(cache_b, out), cwd=REPO, env=_hook_env(folder, point),
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        )  # fmt: skip
        return p, out

    def start_rerun(point, out):
        return subprocess.Popen(
            _demo_argv(cache_b, out), cwd=REPO, stdout=subprocess.PIPE,
            stderr=subprocess.PIPE, text=True,
        )  # fmt: skip

    results: dict[str, dict] = {p: {} for p in KILL_POINTS}
    _pool(
        KILL_POINTS,
        start_kill,
        lambda point, proc, out: results[point].update(
            killed=proc, out=out, after_kill=_snapshot(out)
        ),
    )
    _pool(
        RERUN_POINTS,
        lambda point: (start_rerun(point, results[point]["out"]), results[point]["out"]),
        lambda point, proc, out: results[point].update(rerun=proc),
    )
    return {
        "out_a": out_a,
        "digest_a": digest_a,
        "digest_b": digest_b,
        "cache_b": cache_b,
        "results": results,
    }


def _pool(items, start, finish, limit: int = 2) -> None:
    """Run ``start(item) -> (Popen, out)`` for every item, ``limit`` at a time."""
    pending, running = list(items), {}
    while pending or running:
        while pending and len(running) < limit:
            item = pending.pop(0)
            running[item] = start(item)
        done = [i for i, (p, _) in running.items() if p.poll() is not None]
        for item in done:
            p, out = running.pop(item)
            stdout, stderr = p.communicate()
            finish(item, subprocess.CompletedProcess(p.args, p.returncode, stdout, stderr), out)
        if not done:
            time.sleep(0.05)


def _snapshot(out: Path) -> dict[str, object]:
    """Per output file its digest as it is now; ``unreadable`` lists what cannot be read (a
    GeoPackage GDAL cannot open, an HTML page not ending in </html>, a manifest not JSON)."""
    snap: dict[str, object] = {}
    unreadable = []
    try:
        snap["gpkg"] = layer_hashes(out / "altigrade.gpkg")
    except Exception as exc:  # noqa: BLE001 - reported by the test
        unreadable.append(f"altigrade.gpkg: {exc}")
    for p in sorted(out.glob("[!.]*.csv")) + sorted(out.glob("[!.]*.html")):
        snap[p.name] = hashlib.sha256(p.read_bytes()).hexdigest()
        if p.suffix == ".html" and not p.read_text(encoding="utf-8").rstrip().endswith("</html>"):
            unreadable.append(p.name)
    snap["manifest.json"] = (out / "manifest.json").read_bytes()
    try:
        json.loads(snap["manifest.json"])
    except ValueError:
        unreadable.append("manifest.json")
    snap["unreadable"] = unreadable
    return snap


#: Kill points at which no output may have been replaced yet.
BEFORE_ANY_OUTPUT = {
    *(f"stage:{n}" for n in STAGE_NAMES),
    "layer:altigrade.gpkg",
    "replace:terrain/stations.geoparquet",
}


@pytest.mark.parametrize("point", KILL_POINTS)
def test_killed_run_leaves_previous_outputs_intact(point, scenario) -> None:
    out_a, digest_a, digest_b = scenario["out_a"], scenario["digest_a"], scenario["digest_b"]
    r = scenario["results"][point]
    assert r["killed"].returncode == -signal.SIGKILL, (
        f"kill point {point} was not reached (exit {r['killed'].returncode}): "
        f"{r['killed'].stderr[-500:]}"
    )
    after = r["after_kill"]
    assert after["unreadable"] == []
    assert after["manifest.json"] == (out_a / "manifest.json").read_bytes()
    files = {k: v for k, v in after.items() if k not in ("manifest.json", "unreadable")}
    assert set(files) == set(digest_a) - {"manifest"}
    for name, value in files.items():
        if point in BEFORE_ANY_OUTPUT:
            assert value == digest_a[name], f"{name} changed by a run killed at {point}"
        else:  # killed inside publishing: each file is A's, or B's complete version
            assert value in (digest_a[name], digest_b.get(name)), name


@pytest.mark.parametrize("point", RERUN_POINTS)
def test_rerun_after_kill_equals_clean_run(point, scenario) -> None:
    r = scenario["results"][point]
    assert r["rerun"].returncode == 0, r["rerun"].stderr
    assert output_digest(r["out"]) == scenario["digest_b"]
    leftovers = [p for p in r["out"].rglob(".tmp-*")]
    assert not leftovers, leftovers


def test_kill_by_timing_after_a_stage_is_logged(scenario, tmp_path) -> None:
    """The plain way: no hook; SIGKILL as soon as the verbose log reports the terrain stage
    done (the kill then lands in a later stage)."""
    digest_a, digest_b, cache_b = scenario["digest_a"], scenario["digest_b"], scenario["cache_b"]
    out = tmp_path / "out"
    shutil.copytree(scenario["out_a"], out, symlinks=True)
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    p = subprocess.Popen(
        _demo_argv(Path(cache_b), out, "-v"), cwd=REPO, env=env,
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )  # fmt: skip
    seen = []
    for line in p.stdout:
        seen.append(line)
        if line.startswith("terrain: done"):
            p.send_signal(signal.SIGKILL)
            break
    p.wait(timeout=120)
    assert p.returncode == -signal.SIGKILL, "".join(seen)
    snap = _snapshot(out)
    assert snap["unreadable"] == []
    for name, value in snap.items():
        if name not in ("manifest.json", "unreadable"):
            assert value in (digest_a[name], digest_b.get(name)), name
    rerun = subprocess.run(_demo_argv(Path(cache_b), out), cwd=REPO, capture_output=True)
    assert rerun.returncode == 0
    assert output_digest(out) == digest_b


# ----------------------------------------------------------------------- safe handling


def test_all_files_written_are_under_out(small_demo_inputs, tmp_path) -> None:
    """Every file the demo command writes (but its own demo cache, here already built) lies
    under --out; the inputs and the working folder are untouched."""
    cache = tmp_path / "cache"
    shutil.copytree(small_demo_inputs, cache / small_demo_inputs.name)
    work = tmp_path / "work"
    work.mkdir()
    home = tmp_path / "home"
    home.mkdir()
    out = tmp_path / "result"
    log = tmp_path / "audit.json"
    env = _hook_env(tmp_path, f"audit:{log}")
    env.update(
        HOME=str(home),
        TMPDIR=str(tmp_path / "tmp"),
        MPLCONFIGDIR=str(tmp_path / "mpl"),
        NUMBA_CACHE_DIR=str(tmp_path / "numba"),
    )
    (tmp_path / "tmp").mkdir()
    before = _listing(cache) | _listing(work) | _listing(home)
    proc = subprocess.run(_demo_argv(cache, out), cwd=work, env=env, capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    writes = json.loads(log.read_text(encoding="utf-8"))
    assert any(Path(p).is_relative_to(out) for _, p in writes)  # the hook saw the outputs
    # Allowed besides --out: matplotlib's font cache and Numba's compiled-function cache
    # (library caches, not outputs; kept in MPLCONFIGDIR and NUMBA_CACHE_DIR) and the hook's
    # own log.
    allowed = (out.resolve(), (tmp_path / "mpl").resolve(), (tmp_path / "numba").resolve())
    outside = [
        (e, p)
        for e, p in writes
        if Path(p) != log and not any(Path(p).resolve().is_relative_to(a) for a in allowed)
    ]
    assert not outside, outside
    assert _listing(cache) | _listing(work) | _listing(home) == before
    assert not any((tmp_path / "tmp").iterdir())


def _listing(folder: Path) -> set[tuple[str, int, float]]:
    return {(str(p), p.stat().st_size, p.stat().st_mtime) for p in folder.rglob("*") if p.is_file()}


def test_output_folder_under_a_file_is_a_clear_error(tmp_path, small_demo_inputs) -> None:
    blocker = tmp_path / "not-a-folder"
    blocker.write_text("x", encoding="utf-8")
    cache = tmp_path / "cache"
    shutil.copytree(small_demo_inputs, cache / small_demo_inputs.name)
    proc = run_cli("demo", *SMALL_DEMO, "--out", str(blocker / "out"), "--cache-dir", str(cache))
    assert proc.returncode == 2, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in proc.stderr
    assert str(blocker) in lines[0]


@pytest.mark.skipif(os.geteuid() == 0, reason="root ignores folder permissions (CI runs as root)")
def test_read_only_output_folder_is_a_clear_error(tmp_path) -> None:  # pragma: no cover
    cfg = _tiny(tmp_path)
    ro = tmp_path / "ro"
    ro.mkdir()
    ro.chmod(0o500)
    try:
        with pytest.raises(OutputError, match="permission denied|cannot write"):
            run(load_config(cfg), ro / "out")
    finally:
        ro.chmod(0o700)


def _tiny(folder: Path) -> Path:
    (folder / "stations.csv").write_text(csv_text(GOOD), encoding="utf-8")
    make_dem(folder / "dem.tif")
    return write_config(folder)


def _contents(out: Path) -> dict[str, object]:
    got: dict[str, object] = {"gpkg": layer_hashes(out / "altigrade.gpkg")}
    for p in out.iterdir():
        if p.is_file() and p.suffix != ".gpkg":
            got[p.name] = p.read_bytes()
    return got


class _DiskFull:
    """A file object whose writes fail as on a full disk (reads work)."""

    def __init__(self, f):
        self._f = f

    def write(self, data):
        raise OSError(errno.ENOSPC, "No space left on device")

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return self._f.__exit__(*exc)

    def __getattr__(self, k):
        return getattr(self._f, k)


def test_disk_full_while_writing_text_is_a_clear_output_error(tmp_path, monkeypatch) -> None:
    cfg = _tiny(tmp_path)
    out = tmp_path / "out"
    run(load_config(cfg), out)
    before = _contents(out)
    real_open = open
    monkeypatch.setattr(
        pio, "open", lambda f, mode="r", *a, **k: _DiskFull(real_open(f, mode, *a, **k)),
        raising=False,
    )  # fmt: skip
    with pytest.raises(OutputError) as err:
        run(load_config(cfg), out)
    msg = str(err.value)
    assert "disk is full" in msg and str(out) in msg and "\n" not in msg
    # Every output still holds the previous run's content (the GeoPackage is compared by
    # content: publishing may have rewritten it with the same layers before the failed write,
    # see test_failed_publish_changes_no_output).
    assert _contents(out) == before
    assert not list(out.rglob(".tmp-*"))


def test_disk_full_while_writing_geopackage(tmp_path, monkeypatch) -> None:
    cfg = _tiny(tmp_path)
    out = tmp_path / "out"

    def full(*a, **k):
        raise pyogrio.errors.DataSourceError("sqlite3_step() failed: No space left on device")

    monkeypatch.setattr(pyogrio, "write_dataframe", full)
    with pytest.raises(OutputError, match="altigrade.gpkg.*disk is full"):
        run(load_config(cfg), out)
    assert not (out / "altigrade.gpkg").exists()
    assert not list(out.glob(".tmp-*"))


def test_disk_full_through_the_cli_exits_2_with_one_line(tmp_path, monkeypatch, capsys) -> None:
    cfg = _tiny(tmp_path)
    real_open = open
    monkeypatch.setattr(
        pio, "open", lambda f, mode="r", *a, **k: _DiskFull(real_open(f, mode, *a, **k)),
        raising=False,
    )  # fmt: skip
    code = cli.main(["-q", "run", str(cfg), "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err
    assert code == 2
    assert len(err.strip().splitlines()) == 1 and "disk is full" in err


def test_stale_temporary_files_of_dead_runs_are_removed(tmp_path) -> None:
    """A temporary file of a killed process (its pid no longer alive) goes on the next write;
    one of a live process is left alone."""
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                          capture_output=True, text=True)  # fmt: skip
    dead_pid = int(dead.stdout)
    stale = tmp_path / f".tmp-map.html-{dead_pid}-abc123.html"
    stale.write_text("half", encoding="utf-8")
    live = tmp_path / f".tmp-map.html-{os.getppid()}-def456.html"
    live.write_text("busy", encoding="utf-8")
    pio.write_text_atomic(tmp_path / "map.html", "<html></html>")
    assert (tmp_path / "map.html").read_text(encoding="utf-8") == "<html></html>"
    assert not stale.exists() and live.exists()


def test_failed_publish_changes_no_output(tmp_path) -> None:
    """An input found unusable late (here: the roads file, read for the map) must not leave a
    new GeoPackage beside the old map and manifest."""
    cfg = _tiny(tmp_path)
    out = tmp_path / "out"
    run(load_config(cfg), out)
    before = {p.name: p.read_bytes() for p in out.iterdir() if p.is_file()}
    cfg.write_text(
        cfg.read_text(encoding="utf-8").replace(
            'dem = "dem.tif"', 'dem = "dem.tif"\nroads = "r.gpkg"'
        ),
        encoding="utf-8",
    )
    (tmp_path / "stations.csv").write_text(csv_text(GOOD[:2]), encoding="utf-8")
    with pytest.raises(InputFileError, match="r.gpkg"):
        run(load_config(cfg), out)
    after = {p.name: p.read_bytes() for p in out.iterdir() if p.is_file()}
    assert after == before


@pytest.mark.parametrize("mode", ["local", "threads"])
def test_failure_while_drawing_leaves_the_previous_outputs(tmp_path, monkeypatch, mode) -> None:
    """A document that fails to draw leaves every previous output as it was, also where the
    GeoPackage is being written on another thread at the time (threads mode), and no
    temporary file."""
    import pipeline.report

    cfg = _tiny(tmp_path)
    text = cfg.read_text(encoding="utf-8")
    cfg.write_text(text + f'\n[execution]\nmode = "{mode}"\nworkers = 2\n', encoding="utf-8")
    out = tmp_path / "out"
    run(load_config(cfg), out)
    before = {p.name: p.read_bytes() for p in out.iterdir() if p.is_file()}
    (tmp_path / "stations.csv").write_text(csv_text(GOOD[:2]), encoding="utf-8")
    drawn = tmp_path / "drawn"  # a file: in threads mode the report is drawn in a forked child

    def broken(**kwargs):
        drawn.write_text("tried", encoding="utf-8")
        raise OutputError("report: cannot draw")

    monkeypatch.setattr(pipeline.report, "build_report_html", broken)
    with pytest.raises(OutputError, match="cannot draw"):
        run(load_config(cfg), out)
    assert drawn.exists()
    after = {p.name: p.read_bytes() for p in out.iterdir() if p.is_file()}
    assert after == before
    assert not list(out.rglob(".tmp-*"))


def test_output_folder_holding_the_inputs_is_refused(tmp_path) -> None:
    """--out pointing at the input folder would overwrite stations.csv with the results."""
    cfg = _tiny(tmp_path)
    original = (tmp_path / "stations.csv").read_bytes()
    with pytest.raises(OutputError, match="stations.csv"):
        run(load_config(cfg), tmp_path)
    assert (tmp_path / "stations.csv").read_bytes() == original
