"""The stage runner: executes stages in order (or, when asked, independent stages at the same
time), stores each stage's artefacts, reuses a stage whose inputs, code and parameters are
unchanged, and writes the run manifest.

A stage is a function ``(ctx, upstream) -> dict[str, artefact]``; an artefact is a
GeoDataFrame, a DataFrame, bytes, a JSON-able dict, or an object that turns itself into such
tables (``to_tables()``) and back (``from_tables(tables)``), such as the road graph.
Artefacts are stored under ``<out>/.stages/<stage>/`` as GeoParquet/Parquet/JSON, written
atomically; a stage's ``key.json`` (written last) marks it complete. The cache key hashes:
the stage name, the source code of the modules the stage declares, the package version, the
stage's parameters (a slice of the config), the SHA-256 of its input files, and the keys of
upstream stages.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import importlib.util
import json
import shutil
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import geopandas as gpd
import pandas as pd
from rasterio.errors import RasterioIOError

from pipeline import __version__
from pipeline.config import RunConfig
from pipeline.errors import InputFileError
from pipeline.io import atomic_path, file_sha256, write_text_atomic

__all__ = [
    "Stage",
    "StageContext",
    "RunResult",
    "run_stages",
    "stage_needs",
    "chain_lengths",
    "Progress",
]

Progress = Callable[[str, float], None]


@dataclass(frozen=True)
class Stage:
    """One step of the pipeline.

    Attributes
    ----------
    name : short identifier (also the artefact folder name)
    func : ``func(ctx, upstream) -> dict[str, artefact]``; ``upstream`` maps each needed
        stage's name to its artefacts
    needs : names of upstream stages whose artefacts the stage reads, or a function of the
        config giving them (a stage may need more under some configs)
    params : the slice of the config the stage depends on (JSON-able)
    input_files : files the stage reads directly (hashed into the key)
    modules : dotted module names whose source is the stage's code version
    cacheable : False for stages that must always run (e.g. publishing outputs)
    start_after : stages that must have ended before this one starts where stages overlap,
        though it reads nothing of theirs (an order of work, not a dependency: neither its
        key nor its inputs change); names not in the run are ignored
    """

    name: str
    func: Callable[[StageContext, dict[str, dict[str, Any]]], dict[str, Any]]
    needs: tuple[str, ...] | Callable[[RunConfig], tuple[str, ...]] = ()
    params: Callable[[RunConfig], Any] = lambda cfg: None
    input_files: Callable[[RunConfig], Sequence[Path]] = lambda cfg: ()
    modules: tuple[str, ...] = ()
    cacheable: bool = True
    start_after: tuple[str, ...] = ()


@dataclass
class StageContext:
    """What a stage may use besides its upstream artefacts."""

    config: RunConfig
    out_dir: Path
    today: dt.date
    progress: Progress
    log: Callable[[str], None]
    stage_dir: Path | None = None
    counts: dict[str, Any] = field(default_factory=dict)
    #: SHA-256 of every input file hashed so far (all of them by the last stage).
    inputs_sha256: dict[str, str] = field(default_factory=dict)
    #: Runs a stage's partitions (:class:`pipeline.execution.Executor`); None: in this process.
    executor: Any = None
    #: Timings of a stage's parts [s] ("stage/part"), reported beside the stage timings.
    part_timings: dict[str, float] = field(default_factory=dict)


@dataclass
class RunResult:
    """Artefacts of every stage, the manifest, and the output folder."""

    out_dir: Path
    artefacts: dict[str, dict[str, Any]]
    manifest: dict[str, Any]

    @property
    def stations(self) -> gpd.GeoDataFrame:
        return self.artefacts["publish"]["stations"]

    @property
    def rejected(self) -> gpd.GeoDataFrame:
        return self.artefacts["publish"]["rejected_stations"]


def _json_default(o: Any) -> Any:
    if isinstance(o, Path):
        return str(o)
    if isinstance(o, dt.date | dt.datetime):
        return o.isoformat()
    if hasattr(o, "model_dump"):
        return o.model_dump(mode="json")
    if hasattr(o, "tolist"):
        return o.tolist()
    return str(o)


def _code_hash(modules: Sequence[str]) -> str:
    """SHA-256 of the package version and each module's name and source text.

    The source is read from the module's file without importing the module: a run computes
    every stage's key before its first stage starts, and importing the map and report code
    there (0.5-0.7 s: folium, matplotlib) kept the run's first stages waiting on one core.
    The modules are imported where a stage first needs them.
    """
    h = hashlib.sha256(__version__.encode())
    for m in modules:
        h.update(m.encode())
        h.update(_module_source(m).encode())
    return h.hexdigest()


def _module_source(name: str) -> str:
    """The source text of module ``name`` (universal newlines), found by the import system
    but not imported; the same text whether the module is imported yet or not."""
    spec = importlib.util.find_spec(name)
    source = None
    if spec is not None and spec.loader is not None and hasattr(spec.loader, "get_source"):
        source = spec.loader.get_source(name)
    if source is None:
        raise ModuleNotFoundError(f"no source text for module {name!r}", name=name)
    return source


#: File of an artefact stored as tables: its class and the tables' files (in a sub-folder).
_OBJECT_SUFFIX = ".object.json"


def _save(stage_dir: Path, artefacts: dict[str, Any]) -> list[str]:
    names = []
    for name, obj in artefacts.items():
        if isinstance(obj, gpd.GeoDataFrame):
            with atomic_path(stage_dir / f"{name}.geoparquet") as tmp:
                obj.to_parquet(tmp, index=False)
            names.append(f"{name}.geoparquet")
        elif isinstance(obj, pd.DataFrame):
            with atomic_path(stage_dir / f"{name}.parquet") as tmp:
                obj.to_parquet(tmp, index=False)
            names.append(f"{name}.parquet")
        elif isinstance(obj, bytes):
            with atomic_path(stage_dir / f"{name}.bin") as tmp:
                tmp.write_bytes(obj)
            names.append(f"{name}.bin")
        elif hasattr(obj, "to_tables") and hasattr(type(obj), "from_tables"):
            # an object stored as tables (a road graph, say) and rebuilt from them on load
            parts = _save(stage_dir / name, obj.to_tables())
            kind = f"{type(obj).__module__}.{type(obj).__qualname__}"
            write_text_atomic(
                stage_dir / f"{name}{_OBJECT_SUFFIX}", json.dumps({"class": kind, "files": parts})
            )
            names.append(f"{name}{_OBJECT_SUFFIX}")
        else:
            write_text_atomic(stage_dir / f"{name}.json", json.dumps(obj, default=_json_default))
            names.append(f"{name}.json")
    return names


def _load(stage_dir: Path, names: Sequence[str]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for fname in names:
        p = stage_dir / fname
        name, _, ext = fname.rpartition(".")
        if fname.endswith(_OBJECT_SUFFIX):
            name = fname[: -len(_OBJECT_SUFFIX)]
            desc = json.loads(p.read_text(encoding="utf-8"))
            module, _, cls = desc["class"].rpartition(".")
            if not module.startswith("pipeline."):  # only the pipeline's own classes
                raise ValueError(f"{p}: not a pipeline class: {desc['class']}")
            kind = getattr(importlib.import_module(module), cls)
            out[name] = kind.from_tables(_load(stage_dir / name, desc["files"]))
        elif ext == "geoparquet":
            out[name] = gpd.read_parquet(p)
        elif ext == "parquet":
            out[name] = pd.read_parquet(p)
        elif ext == "bin":
            out[name] = p.read_bytes()
        else:
            out[name] = json.loads(p.read_text(encoding="utf-8"))
    return out


def stage_needs(stage: Stage, config: RunConfig) -> tuple[str, ...]:
    """The upstream stages ``stage`` reads under ``config``."""
    return tuple(stage.needs(config) if callable(stage.needs) else stage.needs)


@dataclass
class _Outcome:
    """What running (or reusing) one stage gave."""

    artefacts: dict[str, Any]
    counts: dict[str, Any]
    part_timings: dict[str, float]
    started: float
    ended: float
    reused: bool


def run_stages(
    stages: Sequence[Stage],
    config: RunConfig,
    out_dir: Path,
    *,
    today: dt.date,
    progress: Progress | None = None,
    log: Callable[[str], None] | None = None,
    executor: Any = None,
    concurrent_stages: int = 1,
) -> RunResult:
    """Run ``stages`` (each stage's needs must come earlier in the list); ``executor`` runs
    the partitions of the stages that split their work (None: in this process).

    With ``concurrent_stages`` = 1 the stages run one after another in list order. With more,
    a stage starts on a thread of its own as soon as every stage it needs is done, up to that
    many at once (a road graph, say, is built while the terrain is sampled). A stage depends
    only on its upstream artefacts, so the artefacts, counts and manifest are the same either
    way; when stages fail, the error of the first failed stage in list order is raised once the
    running ones have ended (none is started after a failure).
    """
    started = time.perf_counter()
    out_dir = Path(out_dir)
    cache_root = out_dir / ".stages"
    lock = threading.Lock()
    progress = _serialised(progress or (lambda label, frac: None), lock)
    log = _serialised(log or (lambda msg: None), lock)
    for p in sorted(cache_root.glob("**/.tmp-*")) if cache_root.exists() else []:
        p.unlink(missing_ok=True)
    # A stage's key depends on its inputs and its upstream keys, never on results: all keys
    # (and every input file's hash) are known before the first stage runs.
    needs = {s.name: stage_needs(s, config) for s in stages}
    in_run = {s.name for s in stages}
    upstream = _transitive(stages, needs)
    keys: dict[str, str] = {}
    input_hashes: dict[str, str] = {}
    for stage in stages:
        missing = [n for n in needs[stage.name] if n not in keys]
        if missing:
            raise ValueError(f"stage {stage.name} needs {missing}, which do not come before it")
        later = [n for n in stage.start_after if n in in_run and n not in keys]
        if later:
            raise ValueError(f"stage {stage.name} starts after {later}, listed after it")
        files = [Path(f) for f in stage.input_files(config) if f is not None]
        for f in files:
            if str(f) not in input_hashes:
                input_hashes[str(f)] = file_sha256(f) if f.is_file() else "missing"
        key_src = {
            "stage": stage.name,
            "code": _code_hash(stage.modules),
            "params": stage.params(config),
            "inputs": {str(f): input_hashes[str(f)] for f in files},
            "upstream": {n: keys[n] for n in needs[stage.name]},
        }
        keys[stage.name] = hashlib.sha256(
            json.dumps(key_src, sort_keys=True, default=_json_default).encode()
        ).hexdigest()
    outcomes: dict[str, _Outcome] = {}

    def run_one(stage: Stage) -> _Outcome:
        t0 = time.perf_counter()
        # the counts of every stage upstream of this one, in list order
        seen: dict[str, Any] = {}
        for s in stages:
            if s.name in upstream[stage.name]:
                seen.update(outcomes[s.name].counts)
        ctx = StageContext(
            config,
            out_dir,
            today,
            progress,
            log,
            cache_root / stage.name,
            dict(seen),
            input_hashes,
            executor,
            {},
        )
        key = keys[stage.name]
        key_file = cache_root / stage.name / "key.json"
        if stage.cacheable and config.execution.reuse_unchanged_stages and key_file.exists():
            try:
                meta = json.loads(key_file.read_text(encoding="utf-8"))
                if meta.get("key") == key:
                    loaded = _load(cache_root / stage.name, meta["files"])
                    log(f"{stage.name}: unchanged, reused")
                    counts = meta.get("counts", {})
                    return _Outcome(loaded, counts, {}, t0, time.perf_counter(), True)
            except (OSError, ValueError, KeyError):
                pass  # a damaged cache entry is recomputed
        progress(stage.name, 0.0)
        try:
            result = stage.func(ctx, {n: outcomes[n].artefacts for n in needs[stage.name]})
        except RasterioIOError as exc:  # a block GDAL cannot decode: the file is damaged
            raise InputFileError(
                f"{config.inputs.dem}: cannot read the raster (stage {stage.name}); the file "
                f"may be damaged: copy or download it again ({' '.join(str(exc).split())})"
            ) from None
        stage_counts = {k: v for k, v in ctx.counts.items() if seen.get(k) != v}
        if key_file.exists():
            key_file.unlink()  # a stored result of other inputs must not outlive this run
        # With reuse off nothing would ever read the stored artefacts: none are written.
        if stage.cacheable and config.execution.reuse_unchanged_stages:
            names = _save(cache_root / stage.name, result)
            write_text_atomic(
                key_file,
                json.dumps(
                    {"key": key, "files": names, "counts": stage_counts}, default=_json_default
                ),
            )
        ended = time.perf_counter()
        progress(stage.name, 1.0)
        log(f"{stage.name}: done in {ended - t0:.2f} s")
        return _Outcome(result, stage_counts, dict(ctx.part_timings), t0, ended, False)

    if concurrent_stages <= 1:
        for stage in stages:
            outcomes[stage.name] = run_one(stage)
    else:
        waits_for = {
            s.name: needs[s.name] + tuple(n for n in s.start_after if n in in_run) for s in stages
        }
        _run_concurrently(stages, waits_for, run_one, outcomes, concurrent_stages)
    counts: dict[str, Any] = {}
    timings: dict[str, float] = {}
    part_timings: dict[str, float] = {}
    for stage in stages:
        o = outcomes[stage.name]
        counts.update(o.counts)
        timings[stage.name] = o.ended - o.started
        part_timings.update(o.part_timings)
    manifest = {
        "altigrade_version": __version__,
        "run_name": config.name,
        "run_date": today.isoformat(),
        "config": config.model_dump(mode="json"),
        "config_file": str(config.source) if config.source else None,
        "inputs_sha256": input_hashes,
        "stage_keys": keys,
        "stages_reused": [s.name for s in stages if outcomes[s.name].reused],
        "timings_s": {k: round(v, 3) for k, v in {**timings, **part_timings}.items()},
        # when each stage ran, from the start of the run [s] (stages may overlap)
        "stage_spans_s": {
            s.name: [
                round(outcomes[s.name].started - started, 3),
                round(outcomes[s.name].ended - started, 3),
            ]
            for s in stages
        },
        "counts": counts,
        "execution": executor.describe() if executor is not None else {"mode": "local"},
        "package_versions": _package_versions(),
    }
    artefacts = {s.name: outcomes[s.name].artefacts for s in stages}
    return RunResult(out_dir, artefacts, manifest)


def _serialised(fn: Callable[..., None], lock: threading.Lock) -> Callable[..., None]:
    """``fn`` called under ``lock`` (stages on several threads report through one display)."""

    def call(*args: Any) -> None:
        with lock:
            fn(*args)

    return call


def _transitive(stages: Sequence[Stage], needs: dict[str, tuple[str, ...]]) -> dict[str, set]:
    """Every stage's upstream stages, direct or not."""
    out: dict[str, set] = {}
    for s in stages:
        out[s.name] = set(needs[s.name]).union(*(out.get(n, set()) for n in needs[s.name]))
    return out


def _run_concurrently(
    stages: Sequence[Stage],
    waits_for: dict[str, tuple[str, ...]],
    run_one: Callable[[Stage], _Outcome],
    outcomes: dict[str, _Outcome],
    at_once: int,
) -> None:
    """Run each stage on a thread of its own once the stages it waits for (its needs and
    ``start_after``) are done, ``at_once`` at most. Among ready stages, the one at the head of
    the longest chain of stages still to come goes first (list order breaks ties): the
    classic longest-path-first rule of list scheduling (Hu, "Parallel sequencing and assembly
    line problems", Operations Research 9(6), 1961), counted in stages, so that a long chain
    (the road graph, profiles, corridors) is not kept waiting by a stage nothing waits for.

    The threads are daemons: an interrupted run does not wait for a long stage to end (every
    artefact is written atomically, so nothing half-written is ever taken for a result)."""
    changed = threading.Condition()
    errors: dict[int, BaseException] = {}
    running: set[str] = set()
    chain = chain_lengths(stages, waits_for)
    waiting = sorted(enumerate(stages), key=lambda item: (-chain[item[1].name], item[0]))

    def work(i: int, stage: Stage) -> None:
        try:
            outcome, error = run_one(stage), None
        except BaseException as exc:  # handed to the run's thread below
            outcome, error = None, exc
        with changed:
            if error is None:
                outcomes[stage.name] = outcome
            else:
                errors[i] = error
            running.discard(stage.name)
            changed.notify_all()

    with changed:
        while True:
            if not errors:
                for item in list(waiting):
                    i, stage = item
                    if len(running) >= at_once:
                        break
                    if all(n in outcomes for n in waits_for[stage.name]):
                        waiting.remove(item)
                        running.add(stage.name)
                        threading.Thread(
                            target=work,
                            args=(i, stage),
                            name=f"altigrade-stage-{stage.name}",
                            daemon=True,
                        ).start()
            if not running and (errors or not waiting):
                break
            changed.wait()
    if errors:
        raise errors[min(errors)]


def chain_lengths(stages: Sequence[Stage], waits_for: dict[str, tuple[str, ...]]) -> dict[str, int]:
    """For each stage, the number of stages on the longest chain that waits for it, directly
    or through others (0 for a stage nothing waits for). ``stages`` must list every stage
    after the ones it waits for."""
    length = {s.name: 0 for s in stages}
    for s in reversed(stages):
        for n in waits_for[s.name]:
            if n in length:
                length[n] = max(length[n], length[s.name] + 1)
    return length


def _package_versions() -> dict[str, str]:
    from importlib import metadata

    names = [
        "numpy",
        "scipy",
        "pandas",
        "geopandas",
        "shapely",
        "pyproj",
        "pyogrio",
        "rasterio",
        "pydantic",
        "folium",
        "matplotlib",
        "scikit-image",
    ]
    out = {}
    for n in names:
        try:
            out[n] = metadata.version(n)
        except metadata.PackageNotFoundError:
            out[n] = "not installed"
    import pyogrio
    import rasterio

    out["GDAL (rasterio)"] = rasterio.__gdal_version__
    out["GDAL (pyogrio)"] = pyogrio.__gdal_version_string__
    return out


def clear_cache(out_dir: Path) -> None:
    """Remove the stored stage artefacts of a run folder."""
    shutil.rmtree(Path(out_dir) / ".stages", ignore_errors=True)
