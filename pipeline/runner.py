"""The stage runner: executes stages in order, stores each stage's artefacts, reuses a stage
whose inputs, code and parameters are unchanged, and writes the run manifest.

A stage is a function ``(ctx, upstream) -> dict[str, artefact]``; an artefact is a
GeoDataFrame, a DataFrame, or a JSON-able dict. Artefacts are stored under
``<out>/.stages/<stage>/`` as GeoParquet/Parquet/JSON, written atomically; a stage's
``key.json`` (written last) marks it complete. The cache key hashes: the stage name, the
source code of the modules the stage declares, the package version, the stage's parameters
(a slice of the config), the SHA-256 of its input files, and the keys of upstream stages.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import importlib
import inspect
import json
import shutil
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

__all__ = ["Stage", "StageContext", "RunResult", "run_stages", "Progress"]

Progress = Callable[[str, float], None]


@dataclass(frozen=True)
class Stage:
    """One step of the pipeline.

    Attributes
    ----------
    name : short identifier (also the artefact folder name)
    func : ``func(ctx, upstream) -> dict[str, artefact]``; ``upstream`` maps each needed
        stage's name to its artefacts
    needs : names of upstream stages whose artefacts the stage reads
    params : the slice of the config the stage depends on (JSON-able)
    input_files : files the stage reads directly (hashed into the key)
    modules : dotted module names whose source is the stage's code version
    cacheable : False for stages that must always run (e.g. publishing outputs)
    """

    name: str
    func: Callable[[StageContext, dict[str, dict[str, Any]]], dict[str, Any]]
    needs: tuple[str, ...] = ()
    params: Callable[[RunConfig], Any] = lambda cfg: None
    input_files: Callable[[RunConfig], Sequence[Path]] = lambda cfg: ()
    modules: tuple[str, ...] = ()
    cacheable: bool = True


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
    h = hashlib.sha256(__version__.encode())
    for m in modules:
        mod = importlib.import_module(m)
        h.update(m.encode())
        h.update(inspect.getsource(mod).encode())
    return h.hexdigest()


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
        else:
            write_text_atomic(stage_dir / f"{name}.json", json.dumps(obj, default=_json_default))
            names.append(f"{name}.json")
    return names


def _load(stage_dir: Path, names: Sequence[str]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for fname in names:
        p = stage_dir / fname
        name, _, ext = fname.rpartition(".")
        if ext == "geoparquet":
            out[name] = gpd.read_parquet(p)
        elif ext == "parquet":
            out[name] = pd.read_parquet(p)
        elif ext == "bin":
            out[name] = p.read_bytes()
        else:
            out[name] = json.loads(p.read_text(encoding="utf-8"))
    return out


def run_stages(
    stages: Sequence[Stage],
    config: RunConfig,
    out_dir: Path,
    *,
    today: dt.date,
    progress: Progress | None = None,
    log: Callable[[str], None] | None = None,
    executor: Any = None,
) -> RunResult:
    """Run ``stages`` in order (each stage's ``needs`` must come earlier); ``executor`` runs
    the partitions of the stages that split their work (None: in this process)."""
    out_dir = Path(out_dir)
    cache_root = out_dir / ".stages"
    progress = progress or (lambda label, frac: None)
    log = log or (lambda msg: None)
    artefacts: dict[str, dict[str, Any]] = {}
    keys: dict[str, str] = {}
    timings: dict[str, float] = {}
    reused: list[str] = []
    counts: dict[str, Any] = {}
    part_timings: dict[str, float] = {}
    input_hashes: dict[str, str] = {}
    for p in sorted(cache_root.glob("*/.tmp-*")) if cache_root.exists() else []:
        p.unlink(missing_ok=True)
    for stage in stages:
        t0 = time.perf_counter()
        files = [Path(f) for f in stage.input_files(config) if f is not None]
        for f in files:
            if str(f) not in input_hashes:
                input_hashes[str(f)] = file_sha256(f) if f.is_file() else "missing"
        key_src = {
            "stage": stage.name,
            "code": _code_hash(stage.modules),
            "params": stage.params(config),
            "inputs": {str(f): input_hashes[str(f)] for f in files},
            "upstream": {n: keys[n] for n in stage.needs},
        }
        key = hashlib.sha256(
            json.dumps(key_src, sort_keys=True, default=_json_default).encode()
        ).hexdigest()
        keys[stage.name] = key
        stage_dir = cache_root / stage.name
        key_file = stage_dir / "key.json"
        ctx = StageContext(
            config,
            out_dir,
            today,
            progress,
            log,
            stage_dir,
            counts,
            input_hashes,
            executor,
            part_timings,
        )
        if stage.cacheable and config.execution.reuse_unchanged_stages and key_file.exists():
            try:
                meta = json.loads(key_file.read_text(encoding="utf-8"))
                if meta.get("key") == key:
                    artefacts[stage.name] = _load(stage_dir, meta["files"])
                    counts.update(meta.get("counts", {}))
                    reused.append(stage.name)
                    timings[stage.name] = time.perf_counter() - t0
                    log(f"{stage.name}: unchanged, reused")
                    continue
            except (OSError, ValueError, KeyError):
                pass  # a damaged cache entry is recomputed
        progress(stage.name, 0.0)
        before = dict(counts)
        try:
            result = stage.func(ctx, {n: artefacts[n] for n in stage.needs})
        except RasterioIOError as exc:  # a block GDAL cannot decode: the file is damaged
            raise InputFileError(
                f"{config.inputs.dem}: cannot read the raster (stage {stage.name}); the file "
                f"may be damaged: copy or download it again ({' '.join(str(exc).split())})"
            ) from None
        artefacts[stage.name] = result
        if key_file.exists():
            key_file.unlink()  # a stored result of other inputs must not outlive this run
        # With reuse off nothing would ever read the stored artefacts: none are written.
        if stage.cacheable and config.execution.reuse_unchanged_stages:
            names = _save(stage_dir, result)
            stage_counts = {k: v for k, v in counts.items() if before.get(k) != v}
            write_text_atomic(
                key_file,
                json.dumps(
                    {"key": key, "files": names, "counts": stage_counts}, default=_json_default
                ),
            )
        timings[stage.name] = time.perf_counter() - t0
        progress(stage.name, 1.0)
        log(f"{stage.name}: done in {timings[stage.name]:.2f} s")
    manifest = {
        "altigrade_version": __version__,
        "run_name": config.name,
        "run_date": today.isoformat(),
        "config": config.model_dump(mode="json"),
        "config_file": str(config.source) if config.source else None,
        "inputs_sha256": input_hashes,
        "stage_keys": keys,
        "stages_reused": reused,
        "timings_s": {k: round(v, 3) for k, v in {**timings, **part_timings}.items()},
        "counts": counts,
        "execution": executor.describe() if executor is not None else {"mode": "local"},
        "package_versions": _package_versions(),
    }
    return RunResult(out_dir, artefacts, manifest)


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
