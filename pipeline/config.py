"""Run configuration: one TOML file per run, parsed into a frozen, validated object.

The file is read with the standard library's ``tomllib`` (no code is evaluated). Unknown keys and
wrong types fail with the key path, the file name and, where a close key exists, a suggestion.
Relative paths resolve against the folder of the config file. Key names carry their units.
"""

from __future__ import annotations

import difflib
import tomllib
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from pipeline.corridors import CorridorParams
from pipeline.errors import ConfigError
from pipeline.inspection import InspectionPlanParams, PriorityWeights
from pipeline.requirement import DEFAULT_FLEET_MIX, DesignDay, FleetModelParams
from pipeline.supply import SupplyParams

__all__ = [
    "RunConfig",
    "InputsConfig",
    "FleetMixConfig",
    "ComplianceConfig",
    "CorridorsConfig",
    "InspectionConfig",
    "SupplyConfig",
    "TerrainConfig",
    "ZonesConfig",
    "OutputsConfig",
    "ExecutionConfig",
    "load_config",
    "parse_config",
]


class _Frozen(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=False)


class InputsConfig(_Frozen):
    """Input files. Paths relative to the config file's folder."""

    stations: Path = Field(description="Station table: CSV, or any vector format GDAL reads.")
    stations_layer: str | None = Field(
        None, description="Layer name when `stations` is a multi-layer vector file."
    )
    stations_crs: str = Field(
        "EPSG:4326",
        description="CRS of the coordinate columns (lon/lat or x/y) of a CSV station table.",
    )
    dem: Path = Field(
        description="Digital elevation model: GeoTIFF or VRT mosaic, metres above sea level."
    )
    roads: Path | None = Field(
        None, description="Road network: LineStrings, any vector format GDAL reads."
    )
    towns: Path | None = Field(None, description="Towns (Points) with a `population` column.")
    fleet_zones: Path | None = Field(None, description="Polygons with per-zone fleet mix shares.")
    inspector_bases: Path | None = Field(
        None, description="Inspector bases: CSV with base_id, name, lon, lat (for the plan)."
    )


class TerrainConfig(_Frozen):
    """Station elevation from the DEM."""

    reject_unplaced: bool = Field(
        True,
        description="Move stations the DEM cannot place (outside its extent, on nodata) to "
        "rejected_stations with the reason; false keeps them as not assessed.",
    )


class FleetMixConfig(_Frozen):
    """Shares of the engine classes: one default mix, optionally per zone from a polygon layer."""

    shares: dict[str, float] = Field(
        default_factory=lambda: dict(DEFAULT_FLEET_MIX),
        description="Default class shares [-] (sum 1) where no fleet zone covers a station "
        "(from memory; replace with registration data).",
    )
    zone_share_prefix: str = Field(
        "share_", description="Fleet-zone columns holding class shares: <prefix><class name>."
    )
    zone_name_column: str = Field("zone_name", description="Fleet-zone column naming the zone.")

    @field_validator("shares")
    @classmethod
    def _sum_one(cls, v: dict[str, float]) -> dict[str, float]:
        if any(x < 0 for x in v.values()) or abs(sum(v.values()) - 1.0) > 1e-3:
            raise ValueError(f"shares must be ≥ 0 and sum to 1 (got {sum(v.values()):g})")
        return v


class ComplianceConfig(_Frozen):
    """Which rule set governs the verdicts (an example unless you supply your own)."""

    rule_file: Path | None = Field(
        None, description="TOML rule set (see config/rules/); relative to the config file."
    )
    rule: dict[str, Any] | None = Field(
        None, description="Inline rule set (same keys as a rule file); instead of rule_file."
    )

    @model_validator(mode="after")
    def _one_source(self) -> ComplianceConfig:
        if self.rule_file is not None and self.rule is not None:
            raise ValueError("give either rule_file or rule, not both")
        return self


class CorridorsConfig(_Frozen):
    """Descent corridors: where sub-standard fuel from high stations is driven."""

    enabled: bool = True
    model: CorridorParams = Field(default_factory=CorridorParams)
    snap_distance_m: float = Field(
        1000.0, gt=0, description="Largest station/town distance to the road network [m]."
    )
    destinations: Literal["towns", "stations"] = Field(
        "towns",
        description="Where fuel is driven: towns weighted by population (needs inputs.towns), "
        "or the other stations weighted by volume.",
    )
    climb_grade_threshold_pct: float = Field(
        4.0, gt=0, description="Grade above which a climb counts as sustained [%]."
    )
    full_load_climb_m: float = Field(
        150.0,
        gt=0,
        description="Sustained climb [m] at which the full sustained-load increment applies; "
        "shorter climbs get a proportional share (planning choice).",
    )
    fallback_grid_cells: int = Field(
        800,
        ge=50,
        le=4000,
        description="Without a road layer: routing-grid size for DEM-derived roads [cells/side].",
    )


class InspectionConfig(_Frozen):
    """The regulator's inspection priorities and plan (weights are planning choices)."""

    enabled: bool = True
    weights: PriorityWeights = Field(default_factory=PriorityWeights)
    plan: InspectionPlanParams = Field(default_factory=InspectionPlanParams)


class SupplyConfig(_Frozen):
    """The distributor's grade-supply plan."""

    enabled: bool = True
    plan: SupplyParams = Field(default_factory=SupplyParams)


class ZonesConfig(_Frozen):
    """Justified-AKI zones over the DEM."""

    enabled: bool = True
    resolution_m: float = Field(900.0, gt=0, description="Cell size of the zone grid [m].")
    band_edges_aki: tuple[float, ...] = Field(
        (85.0, 86.0, 87.0), description="Edges of the justified-AKI bands [AKI], ascending."
    )
    tile_cells: int = Field(512, ge=16, le=8192, description="Zone grid tile size [cells].")

    @field_validator("band_edges_aki")
    @classmethod
    def _ascending(cls, v: tuple[float, ...]) -> tuple[float, ...]:
        if len(v) < 1 or any(b <= a for a, b in zip(v, v[1:], strict=False)):
            raise ValueError("band edges must be a non-empty, strictly ascending list")
        return v


class OutputsConfig(_Frozen):
    """What is written, and in which CRS."""

    crs: str = Field("EPSG:4326", description="CRS of every GeoPackage layer.")
    map_max_basemap_px: int = Field(
        1400, ge=200, le=6000, description="Hillshade size on the map [px]."
    )
    map_max_lines: int = Field(
        20_000,
        ge=100,
        le=1_000_000,
        description="Most road and corridor lines drawn on each HTML map (the busiest roads, "
        "the riskiest corridors); the GeoPackage keeps every line.",
    )


class ExecutionConfig(_Frozen):
    """How the stages run."""

    mode: Literal["local", "threads", "dask"] = Field(
        "local",
        description="'local': stages and their partitions run one after another in this "
        "process; 'threads': partitions on a pool of threads; 'dask': as tasks on a Dask "
        "cluster (the scheduler at execution.scheduler, or a local cluster of worker processes "
        "on 127.0.0.1). In 'threads' and 'dask' independent stages also overlap (the road "
        "graph is built while the terrain is sampled). Results are identical in every mode.",
    )
    workers: int | None = Field(
        None,
        ge=1,
        le=1024,
        description="Threads ('threads'; 1: one stage at a time, nothing overlaps) or worker "
        "processes of the local Dask cluster; default: the number of CPU cores.",
    )
    scheduler: str | None = Field(
        None,
        min_length=1,
        description="Address of a running Dask scheduler (e.g. 'tcp://10.0.0.5:8786'); "
        "None starts a local cluster for the run.",
    )
    connect_timeout_s: float = Field(
        30.0, gt=0, le=3600, description="How long to wait for the Dask scheduler [s]."
    )
    worker_memory_limit: str | None = Field(
        None,
        min_length=1,
        description="Memory limit per local Dask worker (e.g. '4GB'); default: Dask's 'auto'.",
    )
    partition_sources: int = Field(
        1024,
        ge=1,
        description="Corridor sources per partition (sources are ordered spatially first). "
        "With trees rooted at the destinations each partition grows one tree per destination "
        "within reach, so fewer, larger partitions mean fewer trees; a partition holds one bit "
        "per source on every road entry of its trees (1024 sources: 128 bytes per entry).",
    )
    partition_edges: int = Field(131072, ge=1, description="Road edges per edge-profile partition.")
    partition_stations: int = Field(
        4096, ge=1, description="Stations per partition (DEM sampling, fleet model)."
    )
    partition_tiles: int = Field(
        4, ge=1, description="Zone-grid tiles per justified-zones partition."
    )
    reuse_unchanged_stages: bool = Field(
        True,
        description="Skip a stage whose inputs, code and parameters are unchanged (its "
        "artefacts are stored under <out>/.stages; false: nothing is stored or reused).",
    )

    @model_validator(mode="after")
    def _check_mode(self) -> ExecutionConfig:
        if self.scheduler is not None and self.mode != "dask":
            raise ValueError("execution.scheduler is only used with mode = 'dask'")
        return self


class StationDefaultsConfig(_Frozen):
    """Values assumed where a station row leaves an optional column blank."""

    regular_share: float = Field(
        0.75, ge=0, le=1, description="Share of volume sold as regular [0–1]."
    )


class RunConfig(_Frozen):
    """One run of the pipeline."""

    name: str = Field("run", min_length=1, max_length=80)
    inputs: InputsConfig
    terrain: TerrainConfig = TerrainConfig()
    design_day: DesignDay = DesignDay()
    fleet: FleetModelParams = FleetModelParams()
    fleet_mix: FleetMixConfig = FleetMixConfig()
    compliance: ComplianceConfig = ComplianceConfig()
    station_defaults: StationDefaultsConfig = StationDefaultsConfig()
    corridors: CorridorsConfig = CorridorsConfig()
    inspection: InspectionConfig = InspectionConfig()
    supply: SupplyConfig = SupplyConfig()
    zones: ZonesConfig = ZonesConfig()
    outputs: OutputsConfig = OutputsConfig()
    execution: ExecutionConfig = ExecutionConfig()
    #: Where the config came from (set by :func:`load_config`; not a TOML key).
    source: Path | None = Field(None, exclude=True)

    @model_validator(mode="after")
    def _check(self) -> RunConfig:
        unknown = [k for k in self.fleet_mix.shares if k not in self.fleet.classes]
        if unknown:
            raise ValueError(
                f"fleet_mix.shares names unknown engine class(es) {unknown}; "
                f"valid: {', '.join(self.fleet.classes)}"
            )
        return self


# ------------------------------------------------------------------------------------- loading


def _key_path(loc: tuple[Any, ...]) -> str:
    return ".".join(str(p) for p in loc if not isinstance(p, int)) or "(top level)"


def _known_keys(model: type[BaseModel], loc: tuple[Any, ...]) -> list[str]:
    """Keys that are valid at the parent of ``loc``."""
    current: Any = model
    for part in loc[:-1]:
        field = getattr(current, "model_fields", {}).get(part)
        if field is None:
            return []
        ann = field.annotation
        current = ann if isinstance(ann, type) and issubclass(ann, BaseModel) else None
        if current is None:
            # Optional[Model] or unions: take the first BaseModel argument.
            for arg in getattr(ann, "__args__", ()):
                if isinstance(arg, type) and issubclass(arg, BaseModel):
                    current = arg
                    break
        if current is None:
            return []
    return [k for k in getattr(current, "model_fields", {}) if k != "source"]


def _explain(err: ValidationError, model: type[BaseModel], source: str) -> str:
    lines = []
    for e in err.errors()[:8]:
        loc = tuple(e.get("loc", ()))
        path = _key_path(loc)
        if e["type"] == "extra_forbidden":
            known = _known_keys(model, loc)
            close = difflib.get_close_matches(str(loc[-1]), known, n=1)
            hint = (
                f" — did you mean '{close[0]}'?"
                if close
                else (f" — valid keys here: {', '.join(known)}" if known else "")
            )
            lines.append(f"unknown key '{path}'{hint}")
        elif e["type"] == "missing":
            lines.append(f"missing key '{path}'")
        else:
            got = e.get("input")
            got_s = f" (got {got!r})" if not isinstance(got, dict | list) else ""
            lines.append(f"key '{path}': {e['msg']}{got_s}")
    more = len(err.errors()) - 8
    if more > 0:
        lines.append(f"... and {more} more")
    return _printable(f"{source}: " + "; ".join(lines))


def _printable(text: str) -> str:
    """Control and other non-printing characters (from unknown keys) as escapes: one line."""
    return "".join(ch if ch.isprintable() else ascii(ch)[1:-1] for ch in text)


def _resolve_paths(
    data: dict[str, Any], base: Path, demo_dir: Path | None, source: str = "<config>"
) -> dict[str, Any]:
    comp = data.get("compliance")
    if isinstance(comp, dict) and isinstance(comp.get("rule_file"), str):
        rp = Path(comp["rule_file"]).expanduser()
        data = {
            **data,
            "compliance": {**comp, "rule_file": str(rp if rp.is_absolute() else base / rp)},
        }
    inputs = data.get("inputs")
    if not isinstance(inputs, dict):
        return data
    out = dict(inputs)
    for key, value in inputs.items():
        if key.endswith(("_crs", "_layer")) or not isinstance(value, str):
            continue
        if value.startswith("{demo}"):
            if demo_dir is None:
                raise ConfigError(
                    f"{source}: key 'inputs.{key}' uses the {{demo}} folder, which only "
                    "`altigrade demo` provides"
                )
            out[key] = str(demo_dir / value.removeprefix("{demo}").lstrip("/"))
        else:
            p = Path(value).expanduser()
            out[key] = str(p if p.is_absolute() else (base / p))
    return {**data, "inputs": out}


def parse_config(
    data: dict[str, Any], *, base_dir: Path, source: str = "<config>", demo_dir: Path | None = None
) -> RunConfig:
    """Validate a config mapping (as read from TOML) into a :class:`RunConfig`."""
    if not isinstance(data, dict):
        raise ConfigError(f"{source}: the config must be a table of keys")
    data = _resolve_paths(data, base_dir, demo_dir, source)
    try:
        cfg = RunConfig.model_validate(data)
    except ValidationError as err:
        raise ConfigError(_explain(err, RunConfig, source)) from None
    return cfg


def load_config(path: str | Path, *, demo_dir: Path | None = None) -> RunConfig:
    """Read and validate the TOML run config at ``path``.

    Raises
    ------
    ConfigError
        The file is missing, not TOML, or any key is unknown, missing or of the wrong type;
        the message names the file and the key path.
    """
    path = Path(path)
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read the config file ({exc.strerror or exc})") from None
    try:
        data = tomllib.loads(raw.decode("utf-8-sig"))
    except UnicodeDecodeError:
        raise ConfigError(f"{path}: the config file is not UTF-8 text") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: not valid TOML ({exc})") from None
    cfg = parse_config(data, base_dir=path.resolve().parent, source=str(path), demo_dir=demo_dir)
    return cfg.model_copy(update={"source": path.resolve()})
